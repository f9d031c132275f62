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


def _readme_python_block() -> str:
    """The first Python block under the README's "## Python API" heading."""
    from pathlib import Path

    text = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")
    section = text[text.index("\n## Python API\n"):]
    start = section.index("```python\n") + len("```python\n")
    return section[start:section.index("```", start)]


def _image_trees(root) -> None:
    """my_images/ and upright/ (3 classes, train/, val/ and test/ splits) of 24x24 grey PNGs (written by Pillow)."""
    import numpy as np
    from PIL import Image

    rng = np.random.default_rng(0)
    for tree in ("my_images", "upright"):
        for split, n in (("train", 6), ("val", 3), ("test", 3)):
            for k, name in enumerate(("bolt", "nut", "washer")):
                folder = root / tree / split / name
                folder.mkdir(parents=True)
                for i in range(n):
                    pixels = rng.integers(0, 60, (24, 24), dtype=np.uint8)
                    pixels[4 + 4 * k:10 + 4 * k, 6:18] = 230  # a bright bar whose height says the class
                    Image.fromarray(pixels).save(folder / f"{i}.png")


def test_the_readme_python_api_block_runs(tmp_path, monkeypatch):
    # the README's block as written, on a tiny model: tray_net (width 4, 24x24 grey) in place of resnet18, whose
    # weights file is written here; my_images/ and upright/ are small Pillow-written trees; 1 epoch, short
    # pre-training (the recipe file's other keys as shipped)
    import torch

    from splice.recipes import load_recipe

    code = _readme_python_block()
    subs = {'"torchvision:resnet18"': '"splice.models:tray_net"',
            'kwargs={"num_classes": 3})': 'kwargs={"num_classes": 3, "width": 4}, input_shape=(1, 24, 24))',
            "head_width=32": "head_width=4", "epochs=4": "epochs=1", 'recipe="warp-only"': "recipe=RECIPE"}
    for old, new in subs.items():
        assert old in code, f"the README's Python API block no longer holds {old!r}: update this test's substitution"
        code = code.replace(old, new)
    monkeypatch.chdir(tmp_path)
    _image_trees(tmp_path)
    torch.manual_seed(0)
    torch.save(splice.models.tray_net(num_classes=3, width=4).state_dict(), "r18.pth")
    recipe = load_recipe("warp-only").to_dict()
    recipe["pretrain"].update(epochs=1, batch_size=8)
    recipe["batch_size"] = 8
    from splice.recipes import Recipe

    scope = {"RECIPE": Recipe.from_dict(recipe)}
    torch.set_num_threads(1)
    exec(compile(code, "README.md (Python API)", "exec"), scope)
    assert scope["report"].passed and (tmp_path / "r18.onnx").is_file()
    assert scope["summary"]["steps"] == 3  # 18 training images, batch 8 (ceil 18/8), 1 epoch
    assert (tmp_path / "runs" / "r18" / "inspect").is_dir() and scope["result"] is not None
