"""Adapting to a new site without labels: the label-free recipe against labelled tuning and AdaBN.

Per seed (0, 1, 2 by default), all through ``splice.training.tune``:

1. base: ``splice.models:tray_net`` trained with ``baseline`` on ``digits``
   (its 15 epochs); an affine warp spliced at ``input`` (head width 32);
2. the embedded site: SITE = the ``digits-moved`` train split, no label read;
   scored on the ``digits-moved`` test split. Arms:

   - control: the base fine-tuned with ``baseline`` on labelled ``digits-moved``, E epochs;
   - warp-only: the spliced model, ``warp-only`` on labelled ``digits-moved``, E epochs;
   - batchnorm-stats: the base with its BatchNorm statistics re-estimated on SITE (AdaBN);
   - label-free: the spliced model, ``label-free`` with REF = ``digits``, E epochs on SITE;

3. the wrong-defaults site: the digits moved by rotations up to +-90 degrees,
   scale 0.7-1.3 and shift 0.25 (outside the recipes' default ranges of +-60,
   0.8-1.2), written as a PNG ImageFolder tree; control (labelled train split)
   and label-free (the train split's images, labels unread), scored on its test split.

Goals (ratios of errors, mean over seeds; the worst seed is in the note):
label-free <= 0.5x the control, <= 1.5x labelled warp-only, <= 0.5x
batchnorm-stats, <= 1 point of upright accuracy lost against the base; on
the wrong-defaults site label-free <= 0.6x the control. It also prints how
closely each label-free diagnostic tracked the test error over every model,
seed and site (Spearman rank correlation).

Run ``python benchmarks/bench_label_free.py [--epochs E] [--seeds 0,1,2] [--threads T] [--keep DIR]``;
``run()`` returns the rows for ``benchmarks/run.py``.
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
import warnings
from pathlib import Path

__all__ = ["run", "main", "EPOCHS", "SEEDS", "HEAD_WIDTH", "WIDE"]

EPOCHS = 8
SEEDS = (0, 1, 2)
HEAD_WIDTH = 32
_SPEC = "splice.models:tray_net"
# the wrong-defaults site: wider than every recipe default (rotation 60, scale 0.8-1.2)
WIDE = {"rotation_deg": 90.0, "scale": (0.7, 1.3), "shift": 0.25}
_DIAGNOSTICS = ("confidence", "entropy", "agreement", "class_balance")


def _write_wide_site(root: Path) -> Path:
    """The digits moved within WIDE, as PNG files in ``root/{train,val,test}/<class>/``."""
    import numpy as np
    import torch
    from PIL import Image

    from splice.data import open_data
    from splice.distort import DistortionRange, random_distort

    spec = DistortionRange(**WIDE)
    for i, split in enumerate(("train", "val", "test")):
        ds = open_data("digits", split)
        moved, _ = random_distort(ds.images, spec, torch.Generator().manual_seed(1000 + i), fill=0.0)
        pixels = (moved.clamp(0, 1) * 255).round().to(torch.uint8).numpy()
        for j, (img, label) in enumerate(zip(pixels, ds.labels.tolist())):
            folder = root / split / str(label)
            folder.mkdir(parents=True, exist_ok=True)
            Image.fromarray(np.ascontiguousarray(img[0]), mode="L").save(folder / f"{j:04d}.png")
    return root


def _test(folder: Path, data: str) -> float:
    """Test-split error of the model in ``folder`` on ``data``."""
    from splice.evaluation import evaluate

    return 1.0 - float(evaluate(str(folder), data=data, split="test", distort="none")["clean"]["accuracy"])


def _site(folder: Path, site: str, seed: int) -> dict:
    """The label-free diagnostics of the model in ``folder`` on the site images."""
    from splice.adapt import open_images, site_diagnostics
    from splice.data import normalise
    from splice.store import open_source
    from splice.surgery import warps_of

    src = open_source(str(folder))
    model = src.model.eval()
    images = open_images(site, tuple(src.input_shape))
    return site_diagnostics(model, warps_of(model), images, prepare=lambda x: normalise(x, src.normalisation),
                            seed=seed)


def _tune(log, name: str, **kw) -> float:
    from splice.training import tune_keywords

    t0 = time.perf_counter()
    tune_keywords(progress=False, **kw)
    took = time.perf_counter() - t0
    log(f"    {name:<16} {took:6.1f} s")
    return took


def _arms(log, work: Path, base: Path, spliced: Path, site: str, data: str, epochs: int, seed: int,
          labelled: bool) -> dict:
    """Run the arms of one site; returns ``{arm: folder}``."""
    out = {"base": base}
    _tune(log, "control", model=str(base), recipe="baseline", data=data, out=work / "control", epochs=epochs,
          seed=seed)
    out["control"] = work / "control" / "best"
    if labelled:
        _tune(log, "warp-only", model=str(spliced), recipe="warp-only", data=data, out=work / "warp-only",
              epochs=epochs, seed=seed)
        out["warp-only"] = work / "warp-only" / "best"
        _tune(log, "batchnorm-stats", model=str(base), recipe="batchnorm-stats", site=site,
              out=work / "batchnorm-stats", seed=seed)
        out["batchnorm-stats"] = work / "batchnorm-stats" / "best"
    _tune(log, "label-free", model=str(spliced), recipe="label-free", site=site, reference="digits",
          out=work / "label-free", epochs=epochs, seed=seed)
    out["label-free"] = work / "label-free" / "best"
    return out


def _one_seed(log, work: Path, wide: Path, epochs: int, seed: int) -> dict:
    import torch

    import splice

    log(f"  seed {seed}")
    _tune(log, "base", model=_SPEC, recipe="baseline", data="digits", out=work / "base", seed=seed)
    base = work / "base" / "best"
    spliced = work / "spliced"
    with torch.random.fork_rng(devices=[]):  # the head's hidden layers start from the seed too
        torch.manual_seed(seed)
        splice.save(splice.insert(str(base), at=["input"], warp=splice.WarpConfig(head_width=HEAD_WIDTH)), spliced)
    result = {"seed": seed, "embedded": {}, "wide": {}}
    for setting, site, data, labelled in (("embedded", "digits-moved", "digits-moved", True),
                                          ("wide", str(wide), str(wide), False)):
        folders = _arms(log, work / setting, base, spliced, site, data, epochs, seed, labelled)
        for arm, folder in folders.items():
            result[setting][arm] = {"error": _test(folder, data), "site": _site(folder, site, seed)}
        result[setting]["label-free"]["upright_error"] = _test(folders["label-free"], "digits")
        result[setting]["base"]["upright_error"] = _test(base, "digits")
        ranges = json.loads((work / setting / "label-free" / "ranges.json").read_text())
        result[setting]["label-free"]["ranges"] = {k: ranges["estimate"][k]
                                                   for k in ("rotation", "scale", "shift", "perspective")}
        log(f"    {setting}: " + ", ".join(f"{a} {r['error']:.2%}" for a, r in result[setting].items()))
    return result


def _spearman(xs: list[float], ys: list[float]) -> float:
    """Spearman's rank correlation (average ranks for ties), as scipy.stats.spearmanr computes it."""
    from scipy.stats import spearmanr

    return float(spearmanr(xs, ys).statistic)


def tracking(results: list[dict]) -> dict[str, float]:
    """Rank correlation of each site diagnostic with the test error, over every model, seed and site."""
    pairs = [(r["site"], r["error"]) for res in results for setting in ("embedded", "wide")
             for r in res[setting].values()]
    return {d: _spearman([p[0][d] for p in pairs], [p[1] for p in pairs]) for d in _DIAGNOSTICS}


def _mean(results: list[dict], setting: str, arm: str, key: str = "error") -> float:
    return sum(r[setting][arm][key] for r in results) / len(results)


def _ratio_row(results, name: str, setting: str, arm: str, other: str, goal: float) -> dict:
    mean = _mean(results, setting, arm) / max(_mean(results, setting, other), 1e-9)
    per = [r[setting][arm]["error"] / max(r[setting][other]["error"], 1e-9) for r in results]
    errs = ", ".join(f"seed {r['seed']}: {r[setting][arm]['error']:.2%} vs {r[setting][other]['error']:.2%}"
                     for r in results)
    return {"name": name, "ratio": mean, "goal": f"<= {goal:g}", "pass": mean <= goal,
            "note": f"mean over seeds; worst seed {max(per):.3f}; {errs}"}


def rows_of(results: list[dict], epochs: int) -> list[dict]:
    lost = [100.0 * (r["embedded"]["label-free"]["upright_error"] - r["embedded"]["base"]["upright_error"])
            for r in results]
    rows = [
        _ratio_row(results, "label-free: error / control error (digits-moved test)", "embedded", "label-free",
                   "control", 0.5),
        _ratio_row(results, "label-free: error / labelled warp-only error", "embedded", "label-free", "warp-only", 1.5),
        _ratio_row(results, "label-free: error / batchnorm-stats error", "embedded", "label-free",
                   "batchnorm-stats", 0.5),
        {"name": "label-free: upright accuracy lost vs base (points)", "ratio": sum(lost) / len(lost),
         "goal": "<= 1", "pass": sum(lost) / len(lost) <= 1.0,
         "note": "per seed " + ", ".join(f"{v:.2f}" for v in lost)},
        _ratio_row(results, "label-free, wrong defaults (+-90 deg, 0.7-1.3): error / control", "wide",
                   "label-free", "control", 0.6),
    ]
    for row in rows:
        row["note"] += f"; E={epochs}"
    return rows


def run(epochs: int = EPOCHS, seeds=SEEDS, threads: int | None = None, root: str | None = None,
        verbose: bool = True) -> list[dict]:
    import torch

    log = (lambda s: print(s, file=sys.stderr, flush=True)) if verbose else (lambda s: None)
    if threads:
        torch.set_num_threads(threads)
    t0 = time.perf_counter()
    with tempfile.TemporaryDirectory(prefix="splice-label-free-") as tmp, warnings.catch_warnings():
        warnings.simplefilter("ignore")
        work = Path(root or tmp)
        log(f"label-free: E={epochs}, seeds {list(seeds)}, head width {HEAD_WIDTH}, {torch.get_num_threads()} threads")
        wide = _write_wide_site(work / "wide-site")
        results = [_one_seed(log, work / f"seed{seed}", wide, epochs, seed) for seed in seeds]
        (work / "results.json").write_text(json.dumps(results, indent=1, default=str))
    track = tracking(results)
    log("  rank correlation with test error over every model, seed and site: "
        + ", ".join(f"{k} {v:+.2f}" for k, v in track.items()))
    rows = rows_of(results, epochs)
    rows[0]["results"], rows[0]["tracking"] = results, track
    rows[0]["note"] += f"; {time.perf_counter() - t0:.0f} s in all"
    return rows


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--epochs", type=int, default=EPOCHS)
    p.add_argument("--seeds", default=",".join(map(str, SEEDS)), help="comma-separated seeds (default 0,1,2)")
    p.add_argument("--threads", type=int, default=None)
    p.add_argument("--keep", metavar="DIR", help="keep the run folders (and results.json) in DIR")
    args = p.parse_args(argv)
    seeds = [int(s) for s in args.seeds.split(",") if s.strip()]
    rows = run(epochs=args.epochs, seeds=seeds, threads=args.threads, root=args.keep)
    width = max(len(r["name"]) for r in rows)
    print(f"{'benchmark':<{width}}  {'ratio':>7}  {'goal':>7}  pass  note")
    for r in rows:
        print(f"{r['name']:<{width}}  {r['ratio']:7.3f}  {r['goal']:>7}  {'yes' if r['pass'] else 'NO':>4}  {r['note']}")
    return 0 if all(r["pass"] for r in rows) else 1


if __name__ == "__main__":
    raise SystemExit(main())
