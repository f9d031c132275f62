"""Training throughput of ``splice tune`` against a plain hand-written PyTorch loop.

Same model (``splice.models:tray_net``, 1x48x48), same batch (64), same
optimiser (AdamW), same threads, same in-memory data (the ``digits`` train
split, 1078 images), no augmentation. The plain loop is the textbook one::

    for epoch ...:
        for idx in torch.randperm(n).split(64):
            loss = F.cross_entropy(model(images[idx]), labels[idx])
            opt.zero_grad(); loss.backward(); opt.step()

``splice tune`` is measured by the ``images_per_s`` it records in
``metrics.jsonl`` (training time only: evaluation and checkpoint writes are
excluded, as they are from the plain loop). The two are interleaved ``ROUNDS``
times so that the machine's load hits both alike, and the ratio of the medians
of the per-epoch rates is reported. Goal: ratio >= 0.95.

Run ``python benchmarks/bench_tune_throughput.py``; ``run()`` returns the rows
for ``benchmarks/run.py``.
"""

from __future__ import annotations

import statistics
import sys
import tempfile
import time
import warnings
from pathlib import Path

__all__ = ["run", "main"]

_GOAL = 0.95
ROUNDS = 5
EPOCHS = 3
BATCH = 64


def _plain_rates(epochs: int, seed: int) -> list[float]:
    import torch
    import torch.nn.functional as F

    from splice.data import open_data
    from splice.models import tray_net

    ds = open_data("digits", "train")
    images, labels = ds.images, ds.labels
    torch.manual_seed(seed)
    model = tray_net()
    model.train()
    opt = torch.optim.AdamW(model.parameters(), lr=1e-3, weight_decay=1e-4)
    rates = []
    for _ in range(epochs):
        start = time.perf_counter()
        for idx in torch.randperm(len(images)).split(BATCH):
            loss = F.cross_entropy(model(images[idx]), labels[idx])
            opt.zero_grad(set_to_none=True)
            loss.backward()
            opt.step()
        rates.append(len(images) / (time.perf_counter() - start))
    return rates


def _tune_rates(work: Path, epochs: int, seed: int) -> list[float]:
    from splice.recipes import Recipe
    from splice.training import RunOptions, read_metrics, tune

    recipe = Recipe(name="throughput", mode="baseline", optimizer="adamw", lr=1e-3, weight_decay=1e-4,
                    epochs=epochs, batch_size=BATCH, schedule="constant", seed=seed, eval_every=1)
    tune("splice.models:tray_net", recipe=recipe, data="digits", out=work, run_options=RunOptions(progress=False))
    rows = read_metrics(work)
    # one rate per epoch (evaluation time is not in it), as many samples as the plain loop gives
    return [r["images_per_s"] for r in rows if r["phase"] == "epoch"]


def run(rounds: int = ROUNDS, epochs: int = EPOCHS, seed: int = 0) -> list[dict]:
    import torch

    plain, ours = [], []
    with tempfile.TemporaryDirectory(prefix="splice-throughput-") as tmp, warnings.catch_warnings():
        warnings.simplefilter("ignore")
        _plain_rates(1, seed)  # warm-up: first-call allocations, oneDNN kernels
        for i in range(rounds):
            plain.extend(_plain_rates(epochs, seed))
            ours.extend(_tune_rates(Path(tmp) / f"run{i}", epochs, seed))
    ratio = statistics.median(ours) / statistics.median(plain)
    note = (f"tune {statistics.median(ours):,.0f} img/s vs plain {statistics.median(plain):,.0f} img/s "
            f"(medians; batch {BATCH}, {torch.get_num_threads()} threads)")
    return [{"name": "tune: training images/s vs a plain PyTorch loop", "ratio": ratio,
             "goal": f">= {_GOAL}", "pass": ratio >= _GOAL, "note": note}]


def main() -> int:
    rows = run()
    for r in rows:
        print(f"{r['name']}: ratio {r['ratio']:.3f} (goal {r['goal']}) {'pass' if r['pass'] else 'FAIL'} — {r['note']}")
    return 0 if all(r["pass"] for r in rows) else 1


if __name__ == "__main__":
    sys.exit(main())
