"""Run every benchmark and print one table of ratios, each with its goal.

Each benchmark module exposes ``run() -> list[dict]`` with rows
``{"name", "ratio", "goal", "pass", ...}``; ratios are measured against a plain
baseline in the same run, so they hold across machines better than seconds do.

    python benchmarks/run.py              # everything
    python benchmarks/run.py points tune  # a subset, by module name fragment
"""

from __future__ import annotations

import importlib.util
import os
import platform
import sys
import time
import traceback
from pathlib import Path

HERE = Path(__file__).resolve().parent
MODULES = [
    "bench_points",
    "bench_splice_latency",
    "bench_verify",
    "bench_tune_throughput",
    "bench_efficacy",
    "bench_label_free",
    "bench_zoo",
]


def _load(name: str):
    spec = importlib.util.spec_from_file_location(name, HERE / f"{name}.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)  # type: ignore[union-attr]
    return module


def machine() -> str:
    import torch

    cpu = platform.processor() or platform.machine()
    return (f"{platform.system()} {platform.machine()} ({cpu}), {os.cpu_count()} cores, "
            f"torch {torch.__version__}, {torch.get_num_threads()} threads, "
            f"{'CUDA ' + torch.cuda.get_device_name(0) if torch.cuda.is_available() else 'no GPU'}")


def main(argv: list[str]) -> int:
    wanted = [m for m in MODULES if not argv or any(a in m for a in argv)]
    rows: list[dict] = []
    for name in wanted:
        t0 = time.perf_counter()
        try:
            rows.extend(_load(name).run())
        except Exception as exc:  # report and keep going: one broken bench must not hide the rest
            traceback.print_exc()
            rows.append({"name": name, "ratio": float("nan"), "goal": "-", "pass": False,
                         "note": f"{type(exc).__name__}: {exc}"})
        print(f"[{name} took {time.perf_counter() - t0:.0f} s]", file=sys.stderr)
    print(f"machine: {machine()}")
    width = max(len(r["name"]) for r in rows) if rows else 10
    print(f"| {'benchmark'.ljust(width)} | ratio | goal | result |")
    print(f"| {'-' * width} | ---: | --- | --- |")
    for r in rows:
        ratio = r["ratio"]
        shown = f"{ratio:.3f}" if isinstance(ratio, float) else str(ratio)
        print(f"| {r['name'].ljust(width)} | {shown} | {r['goal']} | {'pass' if r['pass'] else 'FAIL'} |")
    return 0 if all(r["pass"] for r in rows) else 1


if __name__ == "__main__":
    raise SystemExit(main(sys.argv[1:]))
