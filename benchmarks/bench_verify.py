"""What a full ``verify --onnx`` costs, in batch-1 forward passes of the base.

A randomly initialised torchvision resnet50 (``weights=None``, 3x224x224) is
spliced at its recommended point(s) and saved to a temporary folder. The
measured call is the whole certificate, ``splice.verify(folder, onnx=True)``
with the library defaults (probe batch 1, float32, opset 17): reading and
hashing the weights, rebuilding the base and the spliced model from the
folder, every check, the ONNX export and both onnxruntime comparisons. The
baseline is one batch-1 eval-mode forward pass of the same base model, the
median of several repeats taken before and after each verification (the
machine's load changes both alike). Goal: a ratio of at most 20.

The first call in a process also pays one-time costs that belong to the
process, not to the certificate: importing ``onnx`` (which the TorchScript
exporter always does, about 0.6 s here, most of it ``ml_dtypes``),
onnxruntime, and the exporter's first use. That call is made first, untimed
for the ratio, and reported as ``cold_ratio``; the ratio is the median of
``repeats`` calls after it. A second row times the same certificate without
``onnx=True``, which separates the export check's cost.

Run ``python benchmarks/bench_verify.py``; ``run()`` returns the rows for
``benchmarks/run.py``.
"""

from __future__ import annotations

import statistics
import sys
import tempfile
import time
import warnings
from pathlib import Path

__all__ = ["run", "main"]

_GOAL = 20.0
_SHAPE = (3, 224, 224)
_FORWARD_REPEATS = 5


def _forward_times(model, x, repeats: int) -> list[float]:
    import torch

    times = []
    with torch.no_grad():
        for _ in range(repeats):
            start = time.perf_counter()
            model(x)
            times.append(time.perf_counter() - start)
    return times


def run(model_name: str = "resnet50", repeats: int = 5) -> list[dict]:
    """Time ``verify(folder, onnx=True)`` against one forward pass; one row."""
    import torch

    import splice
    from splice.errors import RandomWeightsWarning
    from splice.store import read_manifest
    from splice.verification import verify

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RandomWeightsWarning)
        src = splice.load_source(f"torchvision:{model_name}", input_shape=_SHAPE)
        spliced = splice.insert(src, at="recommended")
    base = src.model.eval()
    x = torch.randn(1, *_SHAPE)
    with tempfile.TemporaryDirectory() as tmp:
        folder = splice.save(spliced, Path(tmp) / "spliced")
        del spliced
        _forward_times(base, x, 2)  # warm-up
        forwards = _forward_times(base, x, _FORWARD_REPEATS)
        start = time.perf_counter()
        verify(folder, onnx=True)  # the process's first: imports onnx and onnxruntime
        cold = time.perf_counter() - start
        forwards += _forward_times(base, x, _FORWARD_REPEATS)
        runs, plain = [], []
        for _ in range(repeats):
            start = time.perf_counter()
            report = verify(folder, onnx=True)
            runs.append((time.perf_counter() - start, report))
            forwards += _forward_times(base, x, _FORWARD_REPEATS)
            start = time.perf_counter()
            report = verify(folder)
            plain.append((time.perf_counter() - start, report))
            forwards += _forward_times(base, x, _FORWARD_REPEATS)
        points = [p["name"] for p in read_manifest(folder)["points"]]
    forward = statistics.median(forwards)
    # the median run, whose phases are printed (an occasional garbage collection lands in one run)
    ours, report = sorted(runs, key=lambda r: r[0])[len(runs) // 2]
    plain_s, plain_report = sorted(plain, key=lambda r: r[0])[len(plain) // 2]
    ratio = ours / forward
    plain_ratio = plain_s / forward
    return [{
        "name": f"verify_onnx_{model_name}",
        "ratio": round(ratio, 2),
        "goal": _GOAL,
        "pass": ratio <= _GOAL and report is not None and report.passed,
        "verify_s": round(ours, 2),
        "cold_s": round(cold, 2),
        "cold_ratio": round(cold / forward, 2),
        "forward_ms": round(forward * 1e3, 1),
        "certificate_passed": bool(report is not None and report.passed),
        "points": points,
        # where the time went, in batch-1 forward passes (from the certificate's own clock)
        "phases": {k: round(v / forward, 2) for k, v in (report.meta.get("seconds") or {}).items()},
        "onnx_export_forwards": round(report["onnx"].numbers["export_seconds"] / forward, 2),
        "onnx_check_forwards": round(report["onnx"].numbers["check_seconds"] / forward, 2),
    }, {
        # the same certificate without --onnx, to show what the export check costs on its own
        "name": f"verify_{model_name}",
        "ratio": round(plain_ratio, 2),
        "goal": _GOAL,
        "pass": plain_ratio <= _GOAL and plain_report is not None and plain_report.passed,
        "verify_s": round(plain_s, 2),
        "forward_ms": round(forward * 1e3, 1),
        "certificate_passed": bool(plain_report is not None and plain_report.passed),
        "points": points,
        "phases": {k: round(v / forward, 2) for k, v in (plain_report.meta.get("seconds") or {}).items()},
    }]


def main() -> int:
    for row in run():
        what = "verify --onnx" if "onnx" in row["name"] else "verify"
        print(f"{row['name']}: {what} {row['verify_s']} s, forward {row['forward_ms']} ms "
              f"(points {', '.join(row['points'])}; certificate {'passed' if row['certificate_passed'] else 'FAILED'})")
        print("  phases (forward passes): " + ", ".join(f"{k} {v}" for k, v in row["phases"].items()))
        if "onnx_export_forwards" in row:
            print(f"  onnx check: export {row['onnx_export_forwards']}, onnxruntime and compare "
                  f"{row['onnx_check_forwards']} forwards")
        if "cold_s" in row:
            print(f"  first call in the process (imports onnx, onnxruntime): {row['cold_s']} s "
                  f"= {row['cold_ratio']} forwards")
        verdict = "PASS" if row["pass"] else "FAIL"
        print(f"RESULT {row['name']} ratio={row['ratio']:.2f} goal<={row['goal']} {verdict}")
    return 0


if __name__ == "__main__":
    sys.path.insert(0, str(Path(__file__).resolve().parents[1]))  # run from a checkout
    raise SystemExit(main())
