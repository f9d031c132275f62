"""Beyond the zoo: the same certificate on architectures the tests do not carry.

``tests/zoo.py`` holds the fourteen architectures the issue names and ``tests/test_zoo.py`` runs them in CI.
This script takes the same harness (``run_zoo_model``: points -> insert at ``recommended`` and at the first
cut of stride 4 or more with ``affine`` -> verify with ONNX -> export) over a wider set built with random
weights: timm classifiers of many families, torchvision classifiers and dense-prediction models, and Hugging
Face models saved with ``save_pretrained`` (small configurations). It prints one row per model (pass or the
first line of what failed, the mechanism, the number of points) and the fraction that pass. It takes about
twenty-five minutes on one core, so it is a script, not a test.

Run ``python benchmarks/bench_wider.py [--threads T] [NAME_PART ...]`` (names containing any NAME_PART);
``run()`` returns the rows for ``benchmarks/run.py``.
"""

from __future__ import annotations

import sys
import tempfile
import warnings
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

__all__ = ["run", "main"]

_S64, _S224 = (3, 64, 64), (3, 224, 224)


def _wider():
    from zoo import HF_KINDS, ZooModel

    timm = [("regnetx_002", _S64), ("densenet121", _S64), ("mobilenetv3_small_100", _S64), ("ghostnet_100", _S64),
            ("rexnet_100", _S64), ("dla34", _S64), ("cspresnet50", _S64), ("dpn68", _S64),
            ("efficientvit_b0", _S224), ("levit_128s", _S224), ("poolformer_s12", _S64),
            ("vit_tiny_patch16_224", _S224), ("swin_tiny_patch4_window7_224", _S224), ("repvgg_a0", _S64),
            ("lcnet_050", _S64), ("mixnet_s", _S64), ("inception_v3", (3, 128, 128)), ("xception41", _S64),
            ("resnest14d", _S64), ("skresnet18", _S64), ("fastvit_t8", _S64), ("edgenext_xx_small", _S64),
            ("mobileone_s0", _S64), ("nfnet_l0", _S64), ("hgnetv2_b0", _S64), ("mobilenetv4_conv_small", _S64),
            ("convnextv2_atto", _S64), ("efficientformerv2_s0", _S224), ("tiny_vit_5m_224", _S224),
            ("ghostnetv2_100", _S64), ("res2net50_14w_8s", _S64),
            # LayerNorm over almost-zero channels behind a warp that samples outside the image: ill-conditioned
            # probes, where ONNX parity is judged against float64
            ("pvt_v2_b0", _S224), ("twins_svt_small", _S224), ("focalnet_tiny_srf", _S224),
            ("crossvit_tiny_240", (3, 240, 240)), ("nest_tiny", _S224), ("efficientvit_m0", _S224),
            ("coatnet_nano_rw_224", _S224), ("sequencer2d_s", _S224), ("lambda_resnet26t", (3, 256, 256))]
    torchvision = [("densenet121", _S64, {}), ("googlenet", _S64, {"aux_logits": False, "init_weights": True}),
                   ("inception_v3", (3, 299, 299), {"aux_logits": False, "init_weights": True}),
                   ("shufflenet_v2_x0_5", _S64, {}), ("squeezenet1_0", _S64, {}), ("mnasnet0_5", _S64, {}),
                   ("regnet_y_400mf", _S64, {}), ("swin_t", _S224, {}), ("efficientnet_v2_s", _S64, {}),
                   ("convnext_tiny", _S64, {}), ("vit_b_16", _S224, {}),
                   ("deeplabv3_mobilenet_v3_large", _S64, {"num_classes": 3}),
                   ("lraspp_mobilenet_v3_large", _S64, {"num_classes": 3})]
    within = [("ssdlite320_mobilenet_v3_large", ((3, 320, 320),), {"num_classes": 3}, "backbone"),
              ("raft_large", ((3, 128, 128), (3, 128, 128)), {}, "feature_encoder")]
    out = [ZooModel(f"timm:{name}", f"timm:{name}", (shape,), {"num_classes": 10}) for name, shape in timm]
    out += [ZooModel(f"torchvision:{name}", f"torchvision:{name}", (shape,), kw) for name, shape, kw in torchvision]
    out += [ZooModel(f"torchvision:{name}", f"torchvision:{name}", shapes, kw, within=part)
            for name, shapes, kw, part in within]
    out += [ZooModel(f"hf:{kind}", f"hf:{kind}", (_S224 if kind == "levit" else _S64,))
            for kind in HF_KINDS if kind not in ("resnet", "convnext", "mobilenet_v2")]  # those three are in the zoo
    return tuple(out)


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip()
    return f"{type(exc).__name__}: {text.splitlines()[0][:160] if text else ''}"


def _measure(parts=None) -> list[dict]:
    from zoo import run_zoo_model

    rows = []
    with tempfile.TemporaryDirectory(prefix="splice-wider-") as tmp, warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for entry in _wider():
            if parts and not any(p in entry.id for p in parts):
                continue
            try:
                result = run_zoo_model(entry, Path(tmp))
                report = result["report"]
                why = "" if report.passed else "; ".join(f"{name}: {report[name].detail[:120]}"
                                                         for name in report.failed)
                rows.append({"id": entry.id, "passed": report.passed, "mechanism": result["mechanism"],
                             "points": result["points"], "why": why})
            except Exception as exc:  # a failure of that model, shown in its row
                rows.append({"id": entry.id, "passed": False, "mechanism": "-", "points": 0, "why": _first_line(exc)})
            print(f"{rows[-1]['id']:42} {'PASS' if rows[-1]['passed'] else 'FAIL':5} {rows[-1]['mechanism']:6} "
                  f"{rows[-1]['points']:5} {rows[-1]['why']}", flush=True)
    return rows


def run(parts=None) -> list[dict]:
    """One row ``{"name", "ratio", "goal", "pass"}``: the fraction of the wider set that passes end to end."""
    rows = _measure(parts)
    fraction = sum(r["passed"] for r in rows) / max(len(rows), 1)
    return [{"name": "wider_pass_fraction", "ratio": round(fraction, 3), "goal": 1.0, "pass": fraction >= 1.0}]


def main(argv: list[str]) -> int:
    import argparse

    import torch

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--threads", type=int, default=None, help="torch threads (default: torch's own)")
    parser.add_argument("parts", nargs="*", metavar="NAME_PART")
    args = parser.parse_args(argv)
    if args.threads:
        torch.set_num_threads(args.threads)
    rows = _measure(args.parts or None)
    passed = sum(r["passed"] for r in rows)
    print(f"{passed} of {len(rows)} pass end to end")
    return 0 if passed == len(rows) else 1


if __name__ == "__main__":
    raise SystemExit(main(sys.argv[1:]))
