"""Latency of a spliced resnet18 (affine warp after layer1) against the base.

CPU, batch 8, 3x224x224, both models measured in the same run with the same
threads, alternating call by call so that drift in the machine hits both
equally; the ratio is of the fastest calls (noise only ever adds time), the
ratio of the medians is printed beside it.
Goal: spliced / base <= 1.03.

    python benchmarks/bench_splice_latency.py
"""

from __future__ import annotations

import statistics
import time
import warnings

import torch

GOAL = 1.03


def _pairs(base, spliced, x, pairs: int) -> tuple[list[float], list[float]]:
    """Forward times of both models, alternating call by call (drift hits both alike)."""
    tb, ts = [], []
    with torch.inference_mode():
        for i in range(pairs):
            order = ((base, tb), (spliced, ts)) if i % 2 == 0 else ((spliced, ts), (base, tb))
            for model, times in order:
                t0 = time.perf_counter()
                model(x)
                times.append(time.perf_counter() - t0)
    return tb, ts


def run(pairs: int = 45) -> list[dict]:
    import torchvision

    import splice

    warnings.simplefilter("ignore")
    torch.manual_seed(0)
    base = torchvision.models.resnet18().eval()
    spliced = splice.insert(base, at="layer1_1_relu_1", warp="affine", input_shape=(3, 224, 224)).eval()
    x = torch.randn(8, 3, 224, 224)
    _pairs(base, spliced, x, 3)  # warm-up
    tb, ts = _pairs(base, spliced, x, pairs)
    # the fastest call of each is the least disturbed by the rest of the machine; the
    # medians are reported beside it
    ratio = min(ts) / min(tb)
    return [{"name": "splice latency resnet18+affine@layer1 (b8, 224)", "ratio": ratio, "goal": f"<= {GOAL}",
             "pass": ratio <= GOAL, "base_ms": 1e3 * min(tb), "spliced_ms": 1e3 * min(ts),
             "median_ratio": statistics.median(ts) / statistics.median(tb)}]


if __name__ == "__main__":
    for row in run():
        print(f"{row['name']}: base {row['base_ms']:.1f} ms, spliced {row['spliced_ms']:.1f} ms, "
              f"ratio {row['ratio']:.3f} (medians {row['median_ratio']:.3f}; goal {row['goal']}) "
              f"{'PASS' if row['pass'] else 'FAIL'}")
