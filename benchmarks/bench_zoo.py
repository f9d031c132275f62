"""The zoo end to end, and what points, insert and verify cost in forward passes of each model.

For every architecture of ``tests/zoo.py`` (timm, Hugging Face and torchvision models built with random
weights and BatchNorm statistics calibrated on random inputs), this runs the whole certificate: points ->
insert at ``recommended`` with ``affine`` -> verify with ONNX -> export. It prints the fraction that pass
(goal 1.0) and, per model, the cost of ``points``, ``insert`` and ``verify`` (without ONNX) divided by one
batch-1 eval forward pass of the same model at the input size it is used at (224x224 per input, 320x320
for the detector), the best of three timed just before each run of the step. Goals:
``points`` at most 1 forward pass on every model, ``verify`` without ONNX at most 10; ``insert`` is
reported (it lists the points and traces the model in one pass, splices, and runs one identity check on a
batch of 2). Each cost is the median of
``repeats`` such ratios (the machine's speed drifts on a shared host: a ratio of two timings taken a second
apart is steadier than two medians taken minutes apart).

Run ``python benchmarks/bench_zoo.py [--threads T] [MODEL_ID ...]``; ``run()`` returns the rows for
``benchmarks/run.py``. ``--threads`` sets torch's thread count for the forward baseline and the steps alike
(default: torch's own). It takes several minutes: run it on an otherwise idle machine, or, when other jobs
share the cores, with ``--threads 1`` so that neither the baseline nor the steps fight for a core they do not
have (the ratios then compare single-threaded work on both sides).
"""

from __future__ import annotations

import statistics
import sys
import tempfile
import time
import warnings
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

__all__ = ["run", "main"]

_POINTS_GOAL = 1.0
_VERIFY_GOAL = 10.0
_REPEATS = 5


def _median_ratio(fn, forward, repeats: int) -> float:
    """The median over ``repeats`` of (seconds of ``fn()``) / (seconds of one forward, the best of three timed just
    before it): each ratio compares work done within the same second or so, so a machine whose speed drifts (other
    jobs, a shared host) moves both sides of it alike."""
    ratios = []
    for _ in range(repeats):
        base = forward(3)
        start = time.perf_counter()
        fn()
        ratios.append((time.perf_counter() - start) / base)
    return statistics.median(ratios)


def _costs(entry, workdir: Path, repeats: int) -> dict:
    """Seconds of one forward, and of points / insert / verify (no ONNX) in forward passes."""
    import splice
    from zoo import forward_seconds

    spec, weights = entry.prepare(workdir)
    src = splice.load_source(spec, kwargs=entry.kwargs or None, input_shape=list(entry.usual_shapes),
                             weights=weights)

    def forward(repeat: int) -> float:
        return forward_seconds(src.model, entry.usual_shapes, repeat=repeat)

    seconds = forward(repeats)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        points = _median_ratio(lambda: splice.points(src, within=entry.within), forward, repeats)
        insert = _median_ratio(lambda: splice.insert(src, at="recommended", within=entry.within), forward, repeats)
        folder = splice.save(splice.insert(src, at="recommended", within=entry.within),
                             workdir / f"{entry.id.replace(':', '-')}-bench", overwrite=True)
        verify = _median_ratio(lambda: splice.verify(folder), forward, repeats)
    return {"forward": seconds, "points": points, "insert": insert, "verify": verify}


def _measure(ids=None, repeats: int = _REPEATS) -> tuple[list[dict], float]:
    from zoo import ZOO, run_zoo_model

    entries = [e for e in ZOO if not ids or e.id in ids]
    rows, passed = [], 0
    with tempfile.TemporaryDirectory(prefix="splice-zoo-") as tmp:
        workdir = Path(tmp)
        for entry in entries:
            try:
                result = run_zoo_model(entry, workdir)
                ok = result["report"].passed
                mechanism = result["mechanism"]
            except Exception as exc:  # a failure of the zoo model, counted and shown
                ok, mechanism = False, f"error: {type(exc).__name__}: {exc}"
            passed += ok
            costs = _costs(entry, workdir, repeats) if ok else None
            rows.append({"id": entry.id, "passed": ok, "mechanism": mechanism, "costs": costs})
    return rows, passed / max(len(entries), 1)


def run(ids=None, repeats: int = _REPEATS) -> list[dict]:
    """Rows ``{"name", "ratio", "goal", "pass"}``: the pass fraction, then each model's costs in forwards."""
    rows, fraction = _measure(ids, repeats)
    out = [{"name": "zoo_pass_fraction", "ratio": round(fraction, 3), "goal": 1.0, "pass": fraction >= 1.0}]
    for row in rows:
        if row["costs"] is None:
            continue
        c = row["costs"]
        out.append({"name": f"zoo_points_{row['id']}", "ratio": round(c["points"], 2), "goal": _POINTS_GOAL,
                    "pass": c["points"] <= _POINTS_GOAL})
        out.append({"name": f"zoo_insert_{row['id']}", "ratio": round(c["insert"], 2), "goal": "-", "pass": True})
        out.append({"name": f"zoo_verify_{row['id']}", "ratio": round(c["verify"], 2), "goal": _VERIFY_GOAL,
                    "pass": c["verify"] <= _VERIFY_GOAL})
    return out


def main(argv: list[str]) -> int:
    import argparse

    import torch

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--threads", type=int, default=None, help="torch threads (default: torch's own)")
    parser.add_argument("ids", nargs="*", metavar="MODEL_ID")
    args = parser.parse_args(argv)
    if args.threads:
        torch.set_num_threads(args.threads)
    print(f"torch {torch.__version__}, {torch.get_num_threads()} thread(s)")
    rows, fraction = _measure(args.ids or None)
    print(f"{'model':52} {'result':6} {'mechanism':9} {'forward ms':>10} {'points':>7} {'insert':>7} {'verify':>7}")
    for row in rows:
        c = row["costs"]
        cells = (f"{c['forward'] * 1e3:10.1f} {c['points']:7.2f} {c['insert']:7.2f} {c['verify']:7.2f}"
                 if c else " " * 10)
        print(f"{row['id']:52} {'PASS' if row['passed'] else 'FAIL':6} {row['mechanism'][:60]:9} {cells}")
    print(f"pass fraction {fraction:.2f} (goal 1.0); costs in forward passes of each model "
          f"(goals: points <= {_POINTS_GOAL:g}, verify without ONNX <= {_VERIFY_GOAL:g})")
    return 0 if fraction >= 1.0 else 1


if __name__ == "__main__":
    raise SystemExit(main(sys.argv[1:]))
