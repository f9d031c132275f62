"""The command line's option groups: the model-source options every command that takes MODEL shares, the trust
opt-in, ``--within``, the image pixel cap, and the same options written back as flags for the next command."""

from __future__ import annotations

import argparse

__all__ = ["add_model_options", "add_trust_code", "add_within", "add_pixel_cap", "model_flags", "TRUST_CODE_HELP"]


def add_model_options(p: argparse.ArgumentParser, *, shape: bool = True, optional: bool = False) -> None:
    p.add_argument("model", metavar="MODEL", nargs="?" if optional else None,
                   help="torchvision:NAME, timm:NAME, package.module:factory, path/file.py:factory, a Hugging Face "
                   "save_pretrained folder, or a splice folder" + (" (optional with --resume)" if optional else ""))
    p.add_argument("--weights", metavar="FILE", help=".pt/.pth state dict or .safetensors file")
    p.add_argument("--kwargs", metavar="JSON", help="builder arguments as a JSON object, e.g. '{\"num_classes\": 10}'")
    if shape:
        p.add_argument("--input-shape", metavar="CxHxW", action="append",
                       help="input shape without the batch, e.g. 3x224x224; repeat it for each input of a model "
                            "with several, or give a JSON list such as '[[3,128,128],[3,128,128]]'")
    p.add_argument("--leaf", action="append", default=[], metavar="TYPE",
                   help="module class (name or dotted path) to keep opaque when tracing; repeatable")
    p.add_argument("--allow-partial", action="store_true", help="load only the weights that fit; report the rest")
    p.add_argument("--trust-pickle", action="store_true",
                   help="allow unpickling whole-module checkpoints (can run arbitrary code: only for files you trust)")
    add_trust_code(p)


TRUST_CODE_HELP = ("build a model spec read from a file (a folder's splice.json, a run's run.json) even when no "
                    "registry lists it, and allow code shipped with a model (a Hugging Face config's auto_map); "
                    "this runs code the file names: only for files you trust. Not remembered; "
                    "SPLICE_TRUST_CODE=1 does the same for a shell")


def add_trust_code(p: argparse.ArgumentParser) -> None:
    p.add_argument("--trust-code", action="store_true", help=TRUST_CODE_HELP)


def add_within(p: argparse.ArgumentParser) -> None:
    p.add_argument("--within", metavar="MODULE", default="",
                   help="list and splice points inside this submodule only (e.g. backbone); the whole model is "
                        "saved, loaded and verified")


def add_pixel_cap(p: argparse.ArgumentParser) -> None:
    p.add_argument("--max-image-pixels", type=int, metavar="N",
                   help="refuse images over N pixels before decoding them (default 89478485, Pillow's "
                        "decompression-bomb threshold; also SPLICE_MAX_IMAGE_PIXELS)")


def model_flags(args) -> str:
    """The model-source options the user gave, as flags for the next command to carry (quoted for a shell)."""
    from .options import ModelOptions

    return ModelOptions(weights=args.weights or None, kwargs=args.kwargs or None,
                        input_shape=getattr(args, "input_shape", None) or None, leaves=tuple(args.leaf),
                        trust_pickle=args.trust_pickle, allow_partial=args.allow_partial,
                        trust_code=args.trust_code).as_flags()
