"""Does the warp pay? Spliced tuning against plain fine-tuning on moved digits.

The flow, all through ``splice.training.tune`` with the shipped recipes and one seed:

1. base: ``splice.models:tray_net`` trained with ``baseline`` on ``digits``
   (upright, centred);
2. splice an ``affine`` warp at ``input`` (head width ``HEAD_WIDTH``);
3. tune the spliced model on ``digits-moved`` for ``E`` epochs with ``joint``,
   and separately with ``warp-only`` (each pre-trains its head first, on the
   upright reference images, as the recipe says);
4. control: the base tuned ``E`` more epochs with ``baseline`` on the same
   data, same seed.

Each arm is judged by its ``best/`` folder (chosen on the validation split)
on the ``digits-moved`` test split. Goals: joint error <= 0.3x the control's,
warp-only error <= 0.5x the control's, and warp-only losing at most 1 point of
accuracy on the upright ``digits`` test split compared with the base.

Run ``python benchmarks/bench_efficacy.py [--epochs E] [--seed S] [--threads T]``;
``run()`` returns the rows for ``benchmarks/run.py``.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
import warnings
from pathlib import Path

__all__ = ["run", "main", "EPOCHS", "SEED", "HEAD_WIDTH"]

EPOCHS = 8
SEED = 0
HEAD_WIDTH = 32
_SPEC = "splice.models:tray_net"


def _test_accuracy(folder: Path, data: str) -> float:
    import torch

    import splice
    from splice.data import normalise, open_data

    from splice.manifest import info_of

    model = splice.load(folder)
    facts = info_of(model)
    ds = open_data(data, "test", input_shape=facts.input_shape)
    norm = facts.normalisation
    with torch.no_grad():
        pred = torch.cat([model(normalise(x, norm)).argmax(1) for x in ds.images.split(256)])
    return float((pred == ds.labels).double().mean())


def _arm(log, name: str, **kw) -> dict:
    from splice.training import tune_keywords

    t0, c0 = time.perf_counter(), time.process_time()
    summary = tune_keywords(progress=False, **kw)
    took = {"wall_s": time.perf_counter() - t0, "cpu_s": time.process_time() - c0}
    log(f"  {name:<10} {took['wall_s']:6.1f} s wall, {took['cpu_s']:6.1f} s cpu; best val acc "
        f"{summary['best_accuracy']:.4f} at epoch {summary['best_epoch']}")
    return took


def run(epochs: int = EPOCHS, seed: int = SEED, threads: int | None = None, root: str | None = None,
        verbose: bool = True) -> list[dict]:
    import torch

    import splice

    log = (lambda s: print(s, file=sys.stderr, flush=True)) if verbose else (lambda s: None)
    if threads:
        torch.set_num_threads(threads)
    with tempfile.TemporaryDirectory(prefix="splice-efficacy-") as tmp, warnings.catch_warnings():
        warnings.simplefilter("ignore")
        work = Path(root or tmp)
        times = {}
        log(f"efficacy: E={epochs}, seed={seed}, head width {HEAD_WIDTH}, {torch.get_num_threads()} threads")
        times["base"] = _arm(log, "base", model=_SPEC, recipe="baseline", data="digits", out=work / "base",
                             seed=seed)
        base = work / "base" / "best"
        spliced = work / "spliced"
        with torch.random.fork_rng(devices=[]):  # the head's hidden layers start from the seed too
            torch.manual_seed(seed)
            splice.save(splice.insert(str(base), at=["input"], warp=splice.WarpConfig(head_width=HEAD_WIDTH)), spliced)
        times["control"] = _arm(log, "control", model=str(base), recipe="baseline", data="digits-moved",
                                out=work / "control", epochs=epochs, seed=seed)
        for arm in ("warp-only", "joint"):
            times[arm] = _arm(log, arm, model=str(spliced), recipe=arm, data="digits-moved", out=work / arm,
                              epochs=epochs, seed=seed)
        acc = {
            "base upright": _test_accuracy(base, "digits"),
            "base moved": _test_accuracy(base, "digits-moved"),
            "control moved": _test_accuracy(work / "control" / "best", "digits-moved"),
            "joint moved": _test_accuracy(work / "joint" / "best", "digits-moved"),
            "warp-only moved": _test_accuracy(work / "warp-only" / "best", "digits-moved"),
            "warp-only upright": _test_accuracy(work / "warp-only" / "best", "digits"),
            "joint upright": _test_accuracy(work / "joint" / "best", "digits"),
        }
    err = {k: 1.0 - v for k, v in acc.items()}
    log("  test-split error: " + ", ".join(f"{k} {v:.2%}" for k, v in err.items()))
    total = sum(t["wall_s"] for t in times.values())
    cpu = sum(t["cpu_s"] for t in times.values())
    note = f"E={epochs}, seed={seed}, {total:.0f} s wall / {cpu:.0f} s cpu in all"
    control = max(err["control moved"], 1e-9)
    joint_ratio = err["joint moved"] / control
    warp_ratio = err["warp-only moved"] / control
    upright_loss = 100.0 * (acc["base upright"] - acc["warp-only upright"])
    return [
        {"name": "efficacy: joint error / control error (digits-moved test)", "ratio": joint_ratio,
         "goal": "<= 0.3", "pass": joint_ratio <= 0.3,
         "note": f"{err['joint moved']:.2%} vs {err['control moved']:.2%}; {note}", "errors": err, "times": times},
        {"name": "efficacy: warp-only error / control error (digits-moved test)", "ratio": warp_ratio,
         "goal": "<= 0.5", "pass": warp_ratio <= 0.5,
         "note": f"{err['warp-only moved']:.2%} vs {err['control moved']:.2%}"},
        {"name": "efficacy: warp-only upright accuracy lost vs base (points)", "ratio": upright_loss,
         "goal": "<= 1", "pass": upright_loss <= 1.0,
         "note": f"{acc['warp-only upright']:.2%} vs base {acc['base upright']:.2%}"},
    ]


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--epochs", type=int, default=EPOCHS)
    p.add_argument("--seed", type=int, default=SEED)
    p.add_argument("--threads", type=int, default=None)
    p.add_argument("--keep", metavar="DIR", help="keep the run folders in DIR")
    args = p.parse_args(argv)
    rows = run(epochs=args.epochs, seed=args.seed, threads=args.threads, root=args.keep)
    width = max(len(r["name"]) for r in rows)
    print(f"{'benchmark':<{width}}  {'ratio':>7}  {'goal':>7}  pass  note")
    for r in rows:
        print(f"{r['name']:<{width}}  {r['ratio']:7.3f}  {r['goal']:>7}  {'yes' if r['pass'] else 'NO':>4}  {r['note']}")
    return 0 if all(r["pass"] for r in rows) else 1


if __name__ == "__main__":
    raise SystemExit(main())
