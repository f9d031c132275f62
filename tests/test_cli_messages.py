"""What the command line tells its user: every splice warning, and the nearest names for a typo."""

from __future__ import annotations

import textwrap

import pytest

import splice
from splice import errors
from splice.cli import main
from splice.errors import PointError, SpliceWarning

_UNTRACEABLE = textwrap.dedent('''
    import torch
    from torch import nn

    class Branchy(nn.Module):
        """Python control flow in forward: torch.fx cannot trace it."""

        def __init__(self):
            super().__init__()
            self.conv1 = nn.Conv2d(1, 4, 3, padding=1)
            self.conv2 = nn.Conv2d(4, 4, 3, padding=1)
            self.head = nn.Linear(4, 3)

        def forward(self, x):
            x = torch.relu(self.conv1(x))
            if x.shape[-1] > 4:  # control flow on a shape: fx cannot trace it
                x = x * 1.0
            x = torch.relu(self.conv2(x))
            return self.head(x.mean(dim=(2, 3)))

    def build():
        return Branchy()
''')


def _warning_classes():
    import splice.graph  # noqa: F401  (loads every module that defines a warning)
    import splice.graph.fallback  # noqa: F401
    import splice.graph.tracing  # noqa: F401

    seen, todo = set(), [Warning]
    while todo:
        cls = todo.pop()
        for sub in cls.__subclasses__():
            if sub not in seen:
                seen.add(sub)
                todo.append(sub)
    return sorted((c for c in seen if c.__module__.startswith("splice")), key=lambda c: c.__name__)


def test_every_warning_class_splice_defines_is_a_splice_warning():
    classes = _warning_classes()
    assert {c.__name__ for c in classes} >= {"GraphWarning", "TraceFallbackWarning", "RandomWeightsWarning"}
    assert all(issubclass(c, SpliceWarning) for c in classes), [c for c in classes if not issubclass(c, SpliceWarning)]


def test_points_tells_the_user_that_tracing_fell_back(tmp_path, capsys):
    factory = tmp_path / "branchy.py"
    factory.write_text(_UNTRACEABLE)
    rc = main(["points", f"{factory}:build", "--input-shape", "1x8x8"])
    err = capsys.readouterr().err
    assert rc == 0
    lines = [line for line in err.splitlines() if line.strip()]
    fallback = [line for line in lines if "warning:" in line and "fx" in line]
    assert len(fallback) == 1, err  # one line, not a traceback or a wrapped paragraph
    assert all(line.startswith("warning:") for line in lines), err


_ODD_STRIDES = """
import torch
from torch import nn


class OddStrides(nn.Module):
    def __init__(self):
        super().__init__()
        self.a = nn.Conv2d(1, 4, 3, stride=2, padding=1)  # 10x10 -> 5x5: stride 2
        self.up = nn.Upsample(scale_factor=1.5)            # 5x5 -> 7x7: stride 2 / 1.5 = 1.3333
        self.b = nn.Conv2d(4, 4, (1, 2), stride=(1, 2))   # 7x7 -> 7x3: (1.3333, 2.6667)
        self.c = nn.Conv2d(4, 4, 1)

    def forward(self, x):
        return self.c(self.b(self.up(torch.relu(self.a(x))))).mean((2, 3))


def build():
    return OddStrides()
"""


def test_points_table_shows_strides_that_are_not_whole_numbers(tmp_path, capsys):
    # a stride after an upsampling by 1.5 is a fraction (2 / 1.5), per axis a tuple
    factory = tmp_path / "odd.py"
    factory.write_text(_ODD_STRIDES)
    assert main(["points", f"{factory}:build", "--input-shape", "1x10x10", "--all"]) == 0
    out = capsys.readouterr().out
    assert "1.3333" in out and "1.3333x2.6667" in out, out


def test_unknown_point_suggests_the_nearest_names_in_graph_order():
    # difflib alone ranks 'layer4_1_relu' first for 'layer1_relu' (alphabetical tie-break)
    with pytest.raises(PointError) as caught:
        splice.insert("torchvision:resnet18", at="layer1_relu", input_shape=(3, 64, 64))
    message = str(caught.value)
    assert "did you mean 'layer1_0_relu'" in message
    assert message.index("layer1_0_relu") < message.index("layer4_1_relu") if "layer4_1_relu" in message else True


def test_first_line_of_an_empty_exception_is_its_class_name():
    assert errors.first_line(RuntimeError("")) == "RuntimeError"
    assert errors.first_line(RuntimeError("\n\n  second\nthird")) == "second"


def test_first_line_drops_terminal_colour_codes():
    # torch.onnx's dynamo exporter colours its step lines; they reached splice's one-line errors as escapes
    assert errors.first_line(RuntimeError("\x1b[96mThis is step 2/3\x1b[0m of it\nrest")) == "This is step 2/3 of it"
    assert errors.first_line(RuntimeError("\x1b[1;31m\x1b[0m\nsecond")) == "second"


def test_first_line_goes_on_where_the_line_is_cut_mid_sentence():
    # the TorchScript exporter prints a tensor inside its sentence; torch.onnx puts the cause in a summary
    cut = RuntimeError("output 1 (3\n[ torch.LongTensor{} ]) of traced region did not have observable data\nmore")
    assert errors.first_line(cut) == "output 1 (3 [ torch.LongTensor{} ]) of traced region did not have observable data"
    summary = RuntimeError("Failed to convert. \x1b[96mThis is step 3/3\x1b[0m. Next steps:\n- report it\n\n"
                           "## Exception summary\n\n<class 'AttributeError'>: 'int' object has no attribute 'name'\n")
    assert errors.first_line(summary) == "<class 'AttributeError'>: 'int' object has no attribute 'name'"
    assert errors.first_line(RuntimeError("x" * 400 + "\nnext")) == "x" * 400  # a whole first line is never cut


def test_first_line_ends_at_a_whole_sentence_where_a_wrapped_line_stops_at_a_comma():
    from torch.fx.immutable_collections import immutable_list

    from splice.graph.tracing import reason

    # torch.fx's own message (the reference) wraps its second sentence after a comma
    with pytest.raises(TypeError) as caught:
        immutable_list([1]).append(2)
    assert str(caught.value).splitlines()[0].endswith("kwargs or args of a torch.fx.Node object,")
    assert errors.first_line(caught.value) == "'immutable_list' object does not support mutation."
    assert reason(caught.value) == "TypeError: 'immutable_list' object does not support mutation"
    assert errors.first_line(RuntimeError("a clause cut,\nends here.\nmore")) == "a clause cut, ends here."
    assert len(errors.first_line(RuntimeError("(" + "y\n" * 400))) == 300


def test_argparse_errors_are_one_line(capsys):
    with pytest.raises(SystemExit) as stop:
        main(["insert", "torchvision:resnet18"])
    err = capsys.readouterr().err
    assert stop.value.code == 2 and len(err.strip().splitlines()) == 1 and "--help" in err
    # an option the command does not take points at that command's help, which lists the ones it does
    with pytest.raises(SystemExit) as stop:
        main(["export", "folder", "--onnx", "m.onnx", "--frobnicate"])
    err = capsys.readouterr().err
    assert stop.value.code == 2 and err == ("splice export: error: unrecognized arguments: --frobnicate; see 'splice "
                                            "export --help'\n")


def test_export_takes_dynamic_batch_the_default_by_name(tray_folder, tmp_path):
    """``--dynamic-batch`` (the default, as the export issue wrote it) is taken; with --static-batch it is refused."""
    import onnxruntime as ort

    assert main(["export", str(tray_folder), "--onnx", str(tmp_path / "d.onnx"), "--dynamic-batch"]) == 0
    session = ort.InferenceSession(str(tmp_path / "d.onnx"), providers=["CPUExecutionProvider"])
    assert session.get_inputs()[0].shape[0] == "batch"  # symbolic, as onnxruntime reads it
    with pytest.raises(SystemExit) as stop:
        main(["export", str(tray_folder), "--onnx", "x.onnx", "--dynamic-batch", "--static-batch"])
    assert stop.value.code == 2


def test_main_gives_a_python_caller_its_warning_filters_and_printer_back(tmp_path):
    import warnings

    from splice.cli import main

    with warnings.catch_warnings():
        warnings.resetwarnings()
        warnings.simplefilter("error")
        before, printer = list(warnings.filters), warnings.showwarning
        assert main(["points", "splice.models:tray_net"]) == 0
        assert warnings.filters == before and warnings.showwarning is printer


def test_options_a_folder_settles_itself_are_refused_not_ignored(tmp_path, capsys):
    """A folder carries its weights, builder arguments and input shape: --weights, --kwargs or another
    --input-shape given with one used to be dropped without a word (eval ran the folder's own weights)."""
    import torch

    folder = tmp_path / "spliced"
    splice.save(splice.insert("splice.models:tray_net", at="input", warp=splice.WarpConfig(head_width=4)), folder)
    weights = tmp_path / "other.pt"
    torch.save({}, weights)
    base = ["eval", str(folder), "--data", "digits", "--distort", "none"]
    for extra, needle in ((["--weights", str(weights)], "so --weights (weights=) would be ignored"),
                          (["--kwargs", '{"width": 4}'], "so --kwargs (kwargs=) would be ignored"),
                          (["--input-shape", "1x64x64"], "takes 1x48x48 images (its splice.json records them), "
                                                         "not 1x64x64; drop --input-shape")):
        assert main([*base, *extra]) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and needle in err[0], err
    assert main([*base, "--input-shape", "1x48x48"]) == 0  # the folder's own shape is no conflict


def test_the_next_command_carries_the_options_it_needs(tmp_path, capsys):
    # the insert that points suggested dropped --kwargs and --input-shape; the verify that insert suggested
    # lacked the --trust-code a model file needs
    assert main(["points", "splice.models:tray_net", "--kwargs", '{"num_classes": 3}', "--input-shape",
                 "1x32x32"]) == 0
    text = " ".join(capsys.readouterr().out.split())
    assert "splice insert splice.models:tray_net --kwargs '{\"num_classes\": 3}' --input-shape 1x32x32 --at NAME" in text
    model_file = tmp_path / "net.py"
    model_file.write_text("from splice.models import tray_net\n\n\ndef net():\n    return tray_net()\n\n\n"
                          "net.input_shape = (1, 32, 32)\n")
    out = tmp_path / "spliced"
    assert main(["insert", f"{model_file}:net", "--trust-code", "--at", "input", "--out", str(out)]) == 0
    assert f"Next: splice verify {out} --trust-code" in " ".join(capsys.readouterr().out.split())


def test_a_pickled_module_spliced_by_a_relative_path_verifies_from_anywhere(tmp_path, monkeypatch, capsys):
    # the spec was kept relative ('mod.pt'), so verify run elsewhere could not find it, and the next-command hint
    # left out the --trust-pickle that verify needs as well
    import torch

    from splice.models import tray_net

    torch.manual_seed(0)
    torch.save(tray_net(width=4), tmp_path / "mod.pt")
    monkeypatch.chdir(tmp_path)
    assert main(["insert", "mod.pt", "--at", "input", "--out", "sp", "--input-shape", "1x48x48", "--trust-pickle",
                 "--trust-code"]) == 0
    out = capsys.readouterr().out
    assert "Next: splice verify sp --trust-code --trust-pickle" in out
    monkeypatch.chdir("/")
    assert main(["verify", str(tmp_path / "sp"), "--trust-code", "--trust-pickle"]) == 0


def test_model_options_written_as_flags_parse_back_to_the_same_options(tmp_path):
    """The advice commands carry every model option the user gave; splice's own parser reads them back alike
    (a path with a space, JSON kwargs, two input shapes, a leaf and the opt-ins)."""
    import shlex

    from splice.cli import build_parser
    from splice.cliargs import model_flags
    from splice.options import ModelOptions

    given = ModelOptions(weights=tmp_path / "my weights.pt", kwargs={"width": 4}, input_shape=[(3, 32, 48), "1x8x8"],
                         leaves=("pkg.mod.Block",), trust_pickle=True, allow_partial=True, trust_code=True)
    flags = given.as_flags()
    args = build_parser().parse_args(["insert", "pkg:factory", *shlex.split(flags), "--at", "input", "--out", "o"])
    assert (args.weights, args.kwargs, args.input_shape, args.leaf) == (
        str(tmp_path / "my weights.pt"), '{"width": 4}', ["3x32x48", "1x8x8"], ["pkg.mod.Block"])
    assert args.trust_pickle and args.allow_partial and args.trust_code
    assert model_flags(args) == flags  # the CLI's own echo is the same text
    assert ModelOptions(input_shape=(1, 28, 28)).as_flags() == " --input-shape 1x28x28"
    assert ModelOptions().as_flags() == ""


@pytest.mark.parametrize("raised, code", [(errors.SourceError("no such model"), 2),
                                          (errors.TrainingDiverged("the loss became nan"), 1),
                                          (RuntimeError("a bug"), 2)])
def test_debug_adds_the_traceback_and_keeps_the_exit_code(tmp_path, monkeypatch, capsys, raised, code):
    import splice.verification

    def fails(*args, **kwargs):
        raise raised

    monkeypatch.setattr(splice.verification, "verify", fails)
    missing = str(tmp_path / "nosuchdir")
    assert main(["verify", missing]) == code
    plain = capsys.readouterr().err
    assert main(["verify", missing, "--debug"]) == code
    debug = capsys.readouterr().err
    assert "Traceback" not in plain and len(plain.splitlines()) == 1
    assert debug.startswith("Traceback (most recent call last):") and debug.splitlines()[-1] == plain.strip()


def test_debug_keeps_exit_code_2_for_a_folder_that_does_not_exist(tmp_path, capsys):
    missing = str(tmp_path / "nosuchdir")
    assert main(["verify", missing]) == 2 and main(["verify", missing, "--debug"]) == 2


def test_a_reason_is_not_cut_at_an_abbreviation():
    # "e.g." inside brackets was taken for the end of a sentence and the reason stopped at "(e.g"
    from splice.graph.tracing import reason

    said = reason(ValueError("unsupported operand: the value (e.g. a list) is not a tensor, pass one,\nsee the docs"))
    assert said == "ValueError: unsupported operand: the value (e.g. a list) is not a tensor, pass one, see the docs"
