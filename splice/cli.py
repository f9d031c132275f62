"""The ``splice`` command: a thin layer over the Python API.

Each sub-command parses its options, calls one library function, and renders
the result. Library errors (:class:`~splice.errors.SpliceError`) become one line
on stderr with exit code 2; a failed check (or a diverged training run) exits 1;
``--debug`` shows the traceback.
"""

from __future__ import annotations

import argparse
import json
import os
import signal
import sys
import warnings
from collections.abc import Sequence

from .cliargs import add_model_options, add_pixel_cap, add_trust_code, add_within, model_flags

__all__ = ["main", "build_parser"]

EXIT_OK, EXIT_CHECK_FAILED, EXIT_USAGE = 0, 1, 2


# ----------------------------------------------------------------------------- parser errors


class _Parser(argparse.ArgumentParser):
    """argparse, but a usage error is one line plus a pointer to ``--help`` (exit 2)."""

    def error(self, message: str):  # noqa: D401 - argparse's hook
        self.exit(EXIT_USAGE, f"{self.prog}: error: {message}; see '{self.prog} --help'\n")

    def parse_known_args(self, args=None, namespace=None):
        # an unknown option is reported by the command's own parser, whose --help lists the options it takes
        parsed, extras = super().parse_known_args(args, namespace)
        command = getattr(parsed, "command_parser", None)
        if extras and command is not None and command is not self:
            command.error(f"unrecognized arguments: {' '.join(extras)}")
        return parsed, extras


# ----------------------------------------------------------------------------- consoles


def _console(stderr: bool = False):
    from rich.console import Console

    console = Console(stderr=stderr, no_color=bool(os.environ.get("NO_COLOR")) or None, highlight=False)
    if not console.is_terminal:
        console.width = 200  # pipes and logs: don't squeeze tables into 80 columns
    return console


def _show_warning(message, category, filename, lineno, file=None, line=None):  # noqa: ARG001
    from rich.markup import escape

    text = " ".join(str(message).split())
    try:
        _console(stderr=True).print(f"[bold yellow]warning:[/] {escape(text)}", markup=True, highlight=False,
                                    soft_wrap=True)
    except Exception:  # pragma: no cover - never let a warning crash the command
        print(f"warning: {text}", file=sys.stderr)


# ----------------------------------------------------------------------------- option groups


def _source(args):
    from .store import open_source

    return open_source(
        args.model,
        weights=args.weights,
        kwargs=args.kwargs,
        input_shape=getattr(args, "input_shape", None),
        allow_partial=args.allow_partial,
        trust_pickle=args.trust_pickle,
        leaves=tuple(args.leaf),
        trust_code=args.trust_code,
    )


def _leaves(args, src) -> tuple[str, ...]:
    return tuple(args.leaf) or tuple(src.leaves)


# ----------------------------------------------------------------------------- commands


_MECHANISMS = {
    "fx": "mechanism fx: warps are rewired into the traced graph",
    "hooks": "mechanism hooks: warps go in by forward hooks on the modules that return these points",
}


def _cmd_points(args) -> int:
    from . import graph

    src = _source(args)
    pts = graph.points(src.model, src.input_shapes, all=args.all, leaves=_leaves(args, src), within=args.within)
    report = graph.points_report(args.model, pts[0].shape if args.within else src.input_shape, pts)
    if not args.within and len(src.input_shapes) > 1:  # input_shape stays the first input's
        report = {"model": report.pop("model"), "input_shape": report.pop("input_shape"),
                  "input_shapes": [[int(v) for v in s] for s in src.input_shapes], **report}
    if args.json:
        print(json.dumps(report, indent=2))
        return EXIT_OK
    from rich.table import Table

    where = f" within {args.within}" if args.within else ""
    shape = ", ".join("x".join(map(str, s)) for s in report.get("input_shapes", [report["input_shape"]]))
    table = Table(title=f"insertion points of {args.model}{where} (input {shape})")
    for col, just in (("name", "left"), ("module", "left"), ("shape", "right"), ("stride", "right"),
                      ("cut", "center"), ("in branch (join)", "left"), ("+params", "right"),
                      ("+MACs", "right"), ("recommended", "center")):
        table.add_column(col, justify=just)  # type: ignore[arg-type]
    for p in pts:
        # an int, a float where the input size is not a multiple of the map's, or (sy, sx)
        stride = "x".join(map(str, p.stride)) if isinstance(p.stride, tuple) else str(p.stride)
        table.add_row(
            p.name, p.module or "-", "x".join(map(str, p.shape)), stride,
            "yes" if p.cut else "no", (f"yes ({p.join})" if p.in_branch else "no"),
            f"{p.warp_params:,}", f"{p.warp_macs:,}", "*" if p.recommended else "",
        )
    out = _console()
    out.print(table)
    out.print(f"{len(pts)} points; '*' = recommended; {_MECHANISMS[report['mechanism']]}.")
    if any(p.stride != 1 for p in pts):
        out.print("Feature-level points (stride > 1) are listed but not recommended: measured on plain CNNs, a warp "
                  "there matched the input warp on one model and gave nothing on another, at 1.4-1.7x the time "
                  "(README, 'splice points', on recommended).")
    within = f" --within {args.within}" if args.within else ""
    if src.is_spliced:  # insert takes an original model, with all its points at once
        held = [p["name"] for p in src.manifest["points"]]
        out.print(f"{args.model} already holds warps at {', '.join(held)} (points 'splice_warps_*' are theirs); to "
                  f"splice elsewhere, splice the original model: splice insert {src.spec}{within} "
                  f"{' '.join(f'--at {h}' for h in held)} --at NAME --out DIR")
    else:
        out.print(f"Splice with: splice insert {args.model}{model_flags(args)}{within} --at NAME --out DIR")
    return EXIT_OK


def _cmd_insert(args) -> int:
    from .folders import check_keeps_inputs, check_replaceable
    from .sources import MODULE_SPEC, registry_kind_of, spec_file
    from .manifest import info_of
    from .store import save
    from .surgery import insert
    from .warps import WarpConfig

    given = {"loc_from": args.loc_from, "sampler": args.sampler, "padding": args.padding,
             "head_width": args.head_width, "tps_k": args.tps_k}
    warp = WarpConfig.from_dict({"family": args.warp, **{k: v for k, v in given.items() if v is not None}})
    if args.overwrite:
        check_replaceable(args.out)  # before any work (save checks again)
        check_keeps_inputs(args.out, [args.model, spec_file(args.model), args.weights])
    src = _source(args)
    spliced = insert(src, at=args.at, warp=warp, leaves=_leaves(args, src), force=args.force, within=args.within)
    folder = save(spliced, args.out, overwrite=args.overwrite)
    info = info_of(spliced)
    check = info.check or {}
    out = _console()
    for p in info.points:
        out.print(f"spliced {p.warp.family} warp at {p.name} ({'x'.join(map(str, p.shape))})")
    out.print(_MECHANISMS[info.mechanism] + (f", within {info.within}" if info.within else ""))
    if check:
        verdict = "passed" if check["passed"] else "FAILED (kept with --force)"
        out.print(f"identity check: {verdict} — {check['detail']}")
    # a spec no registry lists is code a folder names: verifying the folder rebuilds it only with the opt-in
    trust = " --trust-code" if info.spec != MODULE_SPEC and registry_kind_of(info.spec, info.kwargs) is None else ""
    trust += " --trust-pickle" if getattr(args, "trust_pickle", False) else ""
    out.print(f"wrote {folder}/ (weights.safetensors, splice.json). Next: splice verify {folder}{trust}")
    return EXIT_OK


def _cmd_verify(args) -> int:
    from .verification import check_report_target, render_verify, verify, write_report

    if args.report:
        check_report_target(args.report)  # before any work: a certificate never replaces a file of the user's
    report = verify(args.folder, images=args.images, batch=args.batch, dtype=args.dtype, onnx=args.onnx,
                    opset=args.opset, seed=args.seed, trust_pickle=args.trust_pickle, exporter=args.exporter,
                    trust_code=args.trust_code)
    if args.report:
        write_report(report, args.report)
    if args.json:
        print(json.dumps(report.to_json(), indent=2))
    else:
        render_verify(report, _console())
    return EXIT_OK if report.passed else EXIT_CHECK_FAILED


def _cmd_export(args) -> int:
    from .exporting import export

    if not args.onnx and not args.pt2:
        from .errors import SpliceError

        raise SpliceError("export needs a target: --onnx FILE and/or --pt2 FILE")
    result = export(args.folder, onnx=args.onnx, pt2=args.pt2, opset=args.opset,
                    dynamic_batch=not args.static_batch, trust_pickle=args.trust_pickle, exporter=args.exporter,
                    trust_code=args.trust_code)
    out = _console()
    for item in result["exports"]:
        perturbed = item.get("max_abs_perturbed")
        extra = f", {perturbed:.3g} with a perturbed warp" if perturbed is not None else " (no warps to perturb)"
        batch = "dynamic batch" if item["dynamic_batch"] else "batch 1"
        out.print(f"wrote {item['path']} ({item['format']}, {batch}): parity max error {item['max_abs']:.3g} "
                  f"as saved{extra} — passed")
    return EXIT_OK


def _cmd_tune(args) -> int:
    from .training import tune_keywords as tune

    summary = tune(
        args.model, recipe=args.recipe, data=args.data, out=args.out, resume=args.resume,
        epochs=args.epochs, lr=args.lr, batch_size=args.batch_size, seed=args.seed, device=args.device,
        quiet=args.quiet, weights=args.weights, kwargs=args.kwargs, input_shape=args.input_shape,
        allow_partial=args.allow_partial, trust_pickle=args.trust_pickle, leaves=tuple(args.leaf),
        workers=args.workers, reference=args.reference, trust_code=args.trust_code, site=args.site,
    )
    if summary and not args.quiet and summary.get("rank", 0) == 0:
        out = _console()
        if summary.get("best_accuracy") is None:  # a label-free run: no accuracy without labels
            out.print(f"run folder {summary['out']} (no label read; see the site diagnostics above)")
        else:
            out.print(f"best val accuracy {summary['best_accuracy']:.4f} at epoch {summary['best_epoch']}; "
                      f"run folder {summary['out']}")
    return EXIT_OK


def _cmd_inspect(args) -> int:
    from .inspection import inspect, render_inspect

    result = inspect(args.folder, data=args.data, n=args.n, split=args.split, out=args.out,
                     trust_pickle=args.trust_pickle, trust_code=args.trust_code, overwrite=args.overwrite)
    render_inspect(result, _console())
    return EXIT_OK


def _cmd_eval(args) -> int:
    from .evaluation import evaluate_keywords as evaluate, render_eval

    result = evaluate(args.model, data=args.data, split=args.split, against=args.against, distort=args.distort,
                      batch_size=args.batch_size, seed=args.seed, plot=args.plot, weights=args.weights,
                      kwargs=args.kwargs,
                      input_shape=args.input_shape, trust_pickle=args.trust_pickle, device=args.device,
                      trust_code=args.trust_code, against_trust_code=args.against_trust_code,
                      against_trust_pickle=args.against_trust_pickle)
    if args.json:
        print(json.dumps(result, indent=2))
    else:
        render_eval(result, _console())
    return EXIT_OK


def _cmd_demo(args) -> int:
    from .demo import demo

    demo(out=args.out, fast=args.fast, quiet=args.quiet)
    return EXIT_OK


# ----------------------------------------------------------------------------- parser


def _parser_points(sub) -> None:
    p = sub.add_parser("points", help="list where a warp can go")
    add_model_options(p)
    p.add_argument("--all", action="store_true", help="list every 4-D activation, not just those between convs")
    add_within(p)
    p.add_argument("--json", action="store_true", help="print the listing as JSON (schema in the README)")
    p.set_defaults(func=_cmd_points)


def _parser_insert(sub) -> None:
    p = sub.add_parser("insert", help="splice identity-initialised warps into a model and save it")
    add_model_options(p)
    p.add_argument("--at", action="append", required=True, metavar="POINT",
                   help="point name from 'splice points', or 'recommended'; repeatable")
    add_within(p)
    p.add_argument("--warp", default="affine", metavar="FAMILY",
                   help="translation, attention, similarity, affine (default), projective or tps")
    p.add_argument("--loc-from", metavar="NAME", help="point the localisation head reads (default: the warped tensor)")
    p.add_argument("--sampler", choices=("bilinear", "nearest", "bicubic"), help="interpolation (default bilinear)")
    p.add_argument("--padding", choices=("zeros", "border", "reflection"),
                   help="outside-the-image values (default zeros)")
    p.add_argument("--head-width", type=int, metavar="N", help="localisation head width (default 16)")
    p.add_argument("--tps-k", type=int, metavar="K", help="thin-plate spline control grid size KxK (default 4)")
    p.add_argument("--out", required=True, metavar="DIR", help="folder to write")
    p.add_argument("--overwrite", action="store_true", help="replace an existing DIR")
    p.add_argument("--force", action="store_true", help="write even if the identity check fails")
    p.set_defaults(func=_cmd_insert)


def _parser_verify(sub) -> None:
    p = sub.add_parser("verify", help="prove a spliced folder equals its base at the identity")
    p.add_argument("folder", metavar="DIR")
    p.add_argument("--images", metavar="FOLDER", help="also probe with the images in FOLDER")
    p.add_argument("--batch", type=int, default=1, metavar="N",
                   help="probe batch size (default 1; more also exercises batch-size-dependent code)")
    p.add_argument("--dtype", choices=("float32", "float64"), default="float32",
                   help="dtype both models run the checks in (default float32; float64 for a tighter tolerance)")
    p.add_argument("--onnx", action="store_true", help="also export to ONNX and check onnxruntime parity")
    p.add_argument("--opset", type=int, default=17, metavar="N", help="ONNX opset (default 17)")
    p.add_argument("--exporter", choices=("torchscript", "dynamo"), default="torchscript",
                   help="ONNX exporter of the --onnx check (default torchscript)")
    p.add_argument("--seed", type=int, default=0, help="seed of the probe batch (default 0)")
    p.add_argument("--json", action="store_true", help="print the certificate as JSON")
    p.add_argument("--report", metavar="FILE", help="write the JSON certificate to FILE")
    add_pixel_cap(p)
    p.add_argument("--trust-pickle", action="store_true",
                   help="allow unpickling the module the folder was made from and the source checkpoint its "
                        "splice.json names (source.weights_file, read for the provenance check); unpickling can run "
                        "arbitrary code: only for folders you trust")
    add_trust_code(p)
    p.set_defaults(func=_cmd_verify)


def _parser_export(sub) -> None:
    p = sub.add_parser("export", help="export a spliced folder and check the copy's parity")
    p.add_argument("folder", metavar="DIR")
    p.add_argument("--onnx", metavar="FILE", help="write an ONNX file")
    p.add_argument("--pt2", metavar="FILE", help="write a torch.export program (.pt2)")
    p.add_argument("--opset", type=int, default=17, metavar="N", help="ONNX opset (default 17)")
    batch = p.add_mutually_exclusive_group()
    batch.add_argument("--static-batch", action="store_true",
                       help="fix the batch dimension to 1 (default: a dynamic batch dimension)")
    batch.add_argument("--dynamic-batch", action="store_true",
                       help="a dynamic batch dimension (the default; kept so that scripts that ask for it work)")
    p.add_argument("--exporter", choices=("torchscript", "dynamo"), default="torchscript",
                   help="ONNX exporter (default torchscript)")
    p.add_argument("--trust-pickle", action="store_true",
                   help="allow the pickled checkpoint or module the folder was made from (the same opt-in as insert)")
    add_trust_code(p)
    p.set_defaults(func=_cmd_export)


def _parser_tune(sub) -> None:
    p = sub.add_parser("tune", help="fine-tune with a shipped recipe (torchrun for several processes)")
    add_model_options(p, optional=True)
    p.add_argument("--recipe", metavar="NAME|FILE",
                   help="baseline, warp-only, joint, staged, label-free, batchnorm-stats, or a path to a .toml "
                        "recipe (optional with --resume)")
    p.add_argument("--data", default=None, metavar="NAME|DIR",
                   help="digits (default), digits-moved, or an ImageFolder tree")
    p.add_argument("--site", default=None, metavar="NAME|DIR",
                   help="label-free and batchnorm-stats: unlabelled images from the new site (a folder, or "
                        "digits-moved); no label is read")
    p.add_argument("--reference", metavar="NAME|DIR",
                   help="images of the kind the base was trained on, for warp-head pre-training; 'train' for the "
                        "training images (default: the recipe's [pretrain] reference; 'auto' finds digits for "
                        "digits-moved and the base's recorded data for a base trained by splice)")
    p.add_argument("--out", metavar="RUN", help="run folder to write")
    p.add_argument("--resume", metavar="RUN", help="continue the run in RUN from its last checkpoint")
    p.add_argument("--epochs", type=int, help="override the recipe's epochs")
    p.add_argument("--lr", type=float, help="override the recipe's learning rate")
    p.add_argument("--batch-size", type=int, help="override the recipe's batch size")
    p.add_argument("--seed", type=int, help="override the recipe's seed")
    p.add_argument("--device", help="cuda, mps or cpu (default: the best available)")
    p.add_argument("--workers", type=int, default=0, help="data-loading worker processes (default 0)")
    p.add_argument("--quiet", action="store_true", help="no progress bars")
    add_pixel_cap(p)
    p.set_defaults(func=_cmd_tune)


def _parser_inspect(sub) -> None:
    p = sub.add_parser("inspect", help="show what the warps learned")
    p.add_argument("folder", metavar="DIR")
    p.add_argument("--data", required=True, metavar="NAME|DIR")
    p.add_argument("--n", type=int, default=64, help="number of images (default 64)")
    p.add_argument("--split", default="test", help="the data split to read (default test)")
    p.add_argument("--out", required=True, metavar="REPORT_DIR",
                   help="folder to write the report to: new, empty, or an earlier report (replaced)")
    p.add_argument("--overwrite", action="store_true",
                   help="write the report into a REPORT_DIR that holds other files (same-named files are replaced)")
    add_pixel_cap(p)
    p.add_argument("--trust-pickle", action="store_true",
                   help="allow the pickled checkpoint or module the folder was made from (the same opt-in as insert)")
    add_trust_code(p)
    p.set_defaults(func=_cmd_inspect)


def _parser_eval(sub) -> None:
    p = sub.add_parser("eval", help="accuracy on clean data and under distortion sweeps")
    add_model_options(p)
    p.add_argument("--data", required=True, metavar="NAME|DIR")
    p.add_argument("--split", default="test", help="the data split to read (default test)")
    p.add_argument("--against", metavar="MODEL2", help="a second model (source or folder) to compare with")
    p.add_argument("--against-trust-code", action="store_true",
                   help="build MODEL2 even when a file it reads names code no registry lists (--trust-code is for "
                        "MODEL alone)")
    p.add_argument("--against-trust-pickle", action="store_true",
                   help="allow unpickling MODEL2's files (--trust-pickle is for MODEL alone)")
    p.add_argument("--distort", metavar="SPEC",
                   help="sweeps, e.g. 'rotate=0,15,30;scale=0.8,1.2;shift=0.1;perspective=0.2' "
                        "(default: a standard sweep)")
    p.add_argument("--batch-size", type=int, default=128, help="images per forward pass (default 128)")
    p.add_argument("--seed", type=int, default=0,
                   help="seed of the perspective sweep's random corner moves (default 0)")
    p.add_argument("--plot", metavar="PNG", help="where to write the accuracy-vs-distortion plot")
    p.add_argument("--device", help="cuda, mps or cpu")
    p.add_argument("--json", action="store_true")
    add_pixel_cap(p)
    p.set_defaults(func=_cmd_eval)


def _parser_demo(sub) -> None:
    p = sub.add_parser("demo", help="run the whole job on the embedded tray-camera digits")
    p.add_argument("--out", default="splice-demo", metavar="DIR")
    p.add_argument("--fast", action="store_true", help="a shorter run (a few minutes on 2 CPU cores)")
    p.add_argument("--quiet", action="store_true", help="no progress output")
    p.set_defaults(func=_cmd_demo)


def build_parser() -> argparse.ArgumentParser:
    from .version import __version__

    parser = _Parser(
        prog="splice",
        description="Insert learned warp modules (spatial transformers) into trained CNNs, "
                    "prove identity equivalence, and fine-tune them.",
    )
    parser.add_argument("--version", action="version", version=f"splice {__version__}")
    parser.add_argument("--debug", action="store_true", help="show full tracebacks on errors")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True
    _parser_points(sub)
    _parser_insert(sub)
    _parser_verify(sub)
    _parser_export(sub)
    _parser_tune(sub)
    _parser_inspect(sub)
    _parser_eval(sub)
    _parser_demo(sub)
    for sp in sub.choices.values():  # `splice CMD ... --debug` works as well as `splice --debug CMD`
        sp.add_argument("--debug", action="store_true", default=argparse.SUPPRESS, help="show full tracebacks")
        sp.set_defaults(command_parser=sp)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    from .fileio import printable_streams

    with warnings.catch_warnings(), printable_streams():  # a Python caller gets its filters and streams back
        return _run(args)


def _run(args) -> int:
    from .errors import CheckFailed, SpliceError, SpliceWarning, first_line

    warnings.showwarning = _show_warning
    if not args.debug:
        # every warning splice itself raises reaches the user (one line each); third-party noise does not
        warnings.filterwarnings("ignore")
        warnings.filterwarnings("default", module=r"splice(\.|$)")
        warnings.filterwarnings("default", category=SpliceWarning)
    try:
        from .errors import debugging
        from .limits import image_pixel_cap

        with image_pixel_cap(getattr(args, "max_image_pixels", None)), debugging(args.debug):
            return int(args.func(args) or 0)
    except CheckFailed as exc:
        return _failed(args, f"{exc.label}: {exc}", EXIT_CHECK_FAILED)
    except SpliceError as exc:
        return _failed(args, f"error: {exc}", EXIT_USAGE)
    except KeyboardInterrupt as exc:
        print(f"splice {args.command}: interrupted", file=sys.stderr)
        # the shell's convention: 128 plus the signal that asked for the stop (SIGINT 130, SIGTERM 143)
        return 128 + int(getattr(exc, "signal_number", None) or signal.SIGINT)
    except (OSError, ValueError) as exc:
        return _failed(args, f"error: {type(exc).__name__}: {exc}", EXIT_USAGE)
    except Exception as exc:  # a bug: still one line, but say so
        return _failed(args, f"internal error: {type(exc).__name__}: {first_line(exc)} "
                             "(rerun with --debug for the traceback and please report it)", EXIT_USAGE)


def _failed(args, line: str, code: int) -> int:
    """The one line on stderr (after the traceback with ``--debug``), and the exit code: the same either way."""
    if args.debug:
        import traceback

        traceback.print_exc(file=sys.stderr)
    print(f"splice {args.command}: {line}", file=sys.stderr)
    return code


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
