"""The package's top level mirrors the CLI: one documented function per verb, each example runs."""

from __future__ import annotations

import doctest
import inspect
import subprocess
import sys

import pytest

import splice

VERBS = ("points", "insert", "save", "load", "verify", "export", "tune", "evaluate", "inspect")
MAX_PARAMETERS = 10


@pytest.mark.parametrize("verb", VERBS)
def test_every_verb_is_a_documented_function(verb):
    fn = getattr(splice, verb)
    assert inspect.isfunction(fn), f"splice.{verb} is {type(fn).__name__}, not a function"
    assert fn.__doc__ and ">>>" in fn.__doc__, f"splice.{verb} has no runnable example in its docstring"
    params = inspect.signature(fn).parameters
    assert len(params) <= MAX_PARAMETERS, f"splice.{verb} takes {len(params)} parameters: {list(params)}"


def test_help_shows_a_function():
    out = subprocess.run([sys.executable, "-c", "import splice; help(splice.verify)"], capture_output=True,
                         text=True, check=True, env={"PAGER": "cat", "PATH": ""}).stdout
    assert "function verify" in out.splitlines()[0] or "verify(" in out


def test_import_stays_cheap():
    code = "import sys, splice; print(sorted(m for m in ('onnx', 'onnxruntime', 'matplotlib', 'sklearn') if m in sys.modules))"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "[]"


@pytest.mark.slow
@pytest.mark.parametrize("verb", VERBS)
def test_docstring_examples_run(verb, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    fn = getattr(splice, verb)
    finder = doctest.DocTestFinder(recurse=False)
    runner = doctest.DocTestRunner(optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE)
    tests = finder.find(fn, f"splice.{verb}", globs={"splice": splice})
    assert tests and tests[0].examples, f"no examples in splice.{verb}"
    for test in tests:
        runner.run(test)
    result = runner.summarize(verbose=False)
    assert result.failed == 0, f"{result.failed} of {result.attempted} examples of splice.{verb} failed"


def test_a_plain_module_object_gets_advice_it_can_follow(tmp_path):
    """verify, export and inspect of a module with no warps, and evaluate without a shape, say what to pass, by
    parameters those functions take (they named save()'s source= and an input_shape= evaluate has no such name for)."""
    import torch
    from torch import nn

    from splice.errors import SpliceError
    from splice.evaluation import EvalOptions
    from splice.options import ModelOptions

    torch.manual_seed(0)
    plain = nn.Sequential(nn.Conv2d(1, 4, 3, padding=1), nn.ReLU(), nn.AdaptiveAvgPool2d(1), nn.Flatten(),
                          nn.Linear(4, 10))
    for call in (lambda: splice.verify(plain), lambda: splice.export(plain, onnx=tmp_path / "p.onnx"),
                 lambda: splice.inspect(plain, data="digits", out=tmp_path / "r")):
        with pytest.raises(SpliceError, match=r"this module holds no warps: .*splice\.insert\(model, at="):
            call()
    spliced = splice.insert(plain, at="input", input_shape=(1, 16, 16))  # the advice, followed
    assert splice.verify(spliced).passed
    with pytest.raises(SpliceError, match=r"model_options=ModelOptions\(input_shape=\(C, H, W\)\)"):
        splice.evaluate(plain, data="digits")
    result = splice.evaluate(plain, data="digits", distort="none", model_options=ModelOptions(input_shape=(1, 16, 16)),
                             options=EvalOptions(limit=8))
    assert result["n_images"] == 8
