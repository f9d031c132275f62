"""Latency of a spliced resnet18 (affine warp after layer1) against the base.

CPU, batch 8, 3x224x224, both models measured in the same run with the same
threads, alternating so that drift in the machine hits both equally.
Goal: spliced / base <= 1.03.

    python benchmarks/bench_splice_latency.py
"""

from __future__ import annotations

import statistics
import time
import warnings

import torch

GOAL = 1.03


def _median_time(model, x, reps):
    times = []
    with torch.inference_mode():
        for _ in range(reps):
            t0 = time.perf_counter()
            model(x)
            times.append(time.perf_counter() - t0)
    return statistics.median(times)


def run(reps: int = 15) -> list[dict]:
    import torchvision

    import splice

    warnings.simplefilter("ignore")
    torch.manual_seed(0)
    base = torchvision.models.resnet18().eval()
    spliced = splice.insert(base, at="layer1_1_relu_1", warp="affine", input_shape=(3, 224, 224)).eval()
    x = torch.randn(8, 3, 224, 224)
    for m in (base, spliced):  # warm-up
        _median_time(m, x, 2)
    tb, ts = [], []
    for _ in range(3):
        tb.append(_median_time(base, x, reps))
        ts.append(_median_time(spliced, x, reps))
    ratio = min(ts) / min(tb)
    return [{"name": "splice latency resnet18+affine@layer1 (b8, 224)", "ratio": ratio, "goal": f"<= {GOAL}",
             "pass": ratio <= GOAL, "base_ms": 1e3 * min(tb), "spliced_ms": 1e3 * min(ts)}]


if __name__ == "__main__":
    for row in run():
        print(f"{row['name']}: base {row['base_ms']:.1f} ms, spliced {row['spliced_ms']:.1f} ms, "
              f"ratio {row['ratio']:.3f} (goal {row['goal']}) {'PASS' if row['pass'] else 'FAIL'}")
