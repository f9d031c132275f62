"""How long listing points takes, against one real forward pass of the same model.

``splice.graph.points`` traces the model with fx and propagates shapes on the
meta device. The baseline is one batch-1, 3x224x224 eval-mode forward pass of
the same randomly initialised torchvision model (``weights=None``), measured in
the same run. Both are timed after a warm-up; the median of several repeats is
used, and the two are timed alternately. The goal is a ratio of at most 1.0: listing should cost no more than
running the model once.

Run ``python benchmarks/bench_points.py``; ``run()`` returns the rows for
``benchmarks/run.py``.
"""

from __future__ import annotations

import statistics
import sys
import time
from pathlib import Path

__all__ = ["run", "main"]

_MODELS = ("densenet121", "resnet50")
_GOAL = 1.0
_REPEATS = 7
_SHAPE = (3, 224, 224)


def _interleaved_medians(a, b, repeats: int) -> tuple[float, float]:
    """Median seconds of ``a`` and ``b``, timed alternately so load changes hit both."""
    a()  # warm-up
    b()
    times_a, times_b = [], []
    for _ in range(repeats):
        for fn, times in ((a, times_a), (b, times_b)):
            start = time.perf_counter()
            fn()
            times.append(time.perf_counter() - start)
    return statistics.median(times_a), statistics.median(times_b)


def _measure(models, repeats: int) -> list[dict]:
    import torch
    import torchvision

    from splice.graph import points

    rows = []
    for name in models:
        model = getattr(torchvision.models, name)(weights=None).eval()
        x = torch.randn(1, *_SHAPE)

        def forward(model=model, x=x):
            with torch.no_grad():
                model(x)

        def listing(model=model):
            points(model, _SHAPE)

        base, ours = _interleaved_medians(forward, listing, repeats)
        ratio = ours / base
        rows.append({
            "name": f"points_{name}",
            "ratio": round(ratio, 3),
            "goal": _GOAL,
            "pass": ratio <= _GOAL,
            "points_ms": round(ours * 1e3, 1),
            "forward_ms": round(base * 1e3, 1),
        })
    return rows


def run(models=_MODELS, repeats: int = _REPEATS) -> list[dict]:
    """Time ``points()`` against one forward pass: rows ``{"name", "ratio", "goal", "pass"}``."""
    return [{k: row[k] for k in ("name", "ratio", "goal", "pass")} for row in _measure(models, repeats)]


def main() -> int:
    for row in _measure(_MODELS, _REPEATS):
        print(f"{row['name']}: points {row['points_ms']} ms, forward {row['forward_ms']} ms")
        verdict = "PASS" if row["pass"] else "FAIL"
        print(f"RESULT {row['name']} ratio={row['ratio']:.2f} goal<={row['goal']} {verdict}")
    return 0


if __name__ == "__main__":
    sys.path.insert(0, str(Path(__file__).resolve().parents[1]))  # run from a checkout
    raise SystemExit(main())
