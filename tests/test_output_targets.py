"""No output silently destroys a user's file: every path a command writes where the user says (eval --plot,
inspect --out, verify --report, export, dump_recipe) replaces only an earlier output of its own kind, and refuses
anything else in one line, before any work, leaving it byte for byte as it was."""

from __future__ import annotations

import json
import warnings
from pathlib import Path

import pytest

import splice
from splice.cli import main
from splice.errors import RandomWeightsWarning, SpliceError

SPEC = "splice.models:tray_net"
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # the first eight bytes of every PNG (PNG specification, section 5.2)


@pytest.fixture(scope="module")
def folder(tmp_path_factory) -> Path:
    """A spliced folder (random weights): the kind of file a stray output path could hit."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RandomWeightsWarning)
        spliced = splice.insert(SPEC, at="input")
    return splice.save(spliced, tmp_path_factory.mktemp("targets") / "spliced")


def _snapshot(root: Path) -> dict[str, bytes]:
    return {str(p.relative_to(root)): p.read_bytes() for p in sorted(root.rglob("*")) if p.is_file()}


def _errors(stderr: str) -> list[str]:
    return [line for line in stderr.splitlines() if not line.startswith("warning:")]


@pytest.fixture
def no_work(monkeypatch):
    """Fail the test if a command loads a model: a refusal comes before any work."""
    import splice.store as store

    def loaded(*args, **kwargs):
        raise AssertionError("the command did work before refusing its output path")

    monkeypatch.setattr(store, "load_source", loaded, raising=False)
    monkeypatch.setattr(store, "open_folder", loaded)


def _eval(model, plot) -> int:
    return main(["eval", str(model), "--data", "digits", "--distort", "rotate=0,30", "--batch-size", "512",
                 "--plot", str(plot)])


# ----------------------------------------------------------------------------- eval --plot


@pytest.mark.parametrize("victim", ["weights.safetensors", "splice.json"])
def test_plot_never_replaces_a_spliced_folders_files(folder, tmp_path, capsys, no_work, victim):
    copy = tmp_path / "victim"
    copy.mkdir()
    for f in folder.iterdir():
        (copy / f.name).write_bytes(f.read_bytes())
    before = _snapshot(copy)
    assert _eval(folder, copy / victim) == 2
    err = _errors(capsys.readouterr().err)
    assert err == [f"splice eval: error: --plot target '{copy / victim}' exists and is not a .png file, so it is "
                   "not replaced; give a file name ending in .png, or move that file away"]
    assert _snapshot(copy) == before


def test_plot_refuses_a_text_file_a_folder_and_a_path_inside_the_data(folder, tmp_path, capsys, no_work):
    notes = tmp_path / "notes.txt"
    notes.write_text("my notes\n")
    assert _eval(folder, notes) == 2
    assert "'%s' exists and is not a .png file" % notes in capsys.readouterr().err
    assert notes.read_text() == "my notes\n"
    assert _eval(folder, tmp_path) == 2
    assert f"--plot target '{tmp_path}' is a folder; give a file name such as plot.png" in capsys.readouterr().err
    data = tmp_path / "tree"
    (data / "train" / "zero").mkdir(parents=True)
    code = main(["eval", str(folder), "--data", str(data), "--plot", str(data / "train" / "zero" / "plot.png")])
    err = _errors(capsys.readouterr().err)
    assert code == 2 and len(err) == 1 and f"is inside '{data}', which this command reads images from" in err[0]
    assert not (data / "train" / "zero" / "plot.png").exists()


def test_plot_replaces_an_earlier_png_whatever_the_case_of_its_suffix(folder, tmp_path, capsys):
    plot = tmp_path / "sweep.PNG"
    plot.write_bytes(b"an earlier plot")
    assert _eval(folder, plot) == 0
    capsys.readouterr()
    assert plot.read_bytes().startswith(PNG_SIGNATURE)


def test_draw_sweep_plot_refuses_too(folder, tmp_path):
    """The Python API's writer keeps the rule (save_png checks every PNG it writes)."""
    from splice.evaluation import draw_sweep_plot

    result = splice.evaluate(str(folder), data="digits", distort="rotate=0")
    notes = tmp_path / "notes.txt"
    notes.write_text("keep\n")
    with pytest.raises(SpliceError, match="exists and is not a .png file"):
        draw_sweep_plot(result, notes)
    with pytest.raises(SpliceError, match="exists and is not a .png file"):
        splice.evaluate(str(folder), data="digits", distort="rotate=0", plot=notes)
    assert notes.read_text() == "keep\n"


# ----------------------------------------------------------------------------- inspect --out


def _inspect(folder, out, *extra) -> int:
    return main(["inspect", str(folder), "--data", "digits-moved", "--n", "4", "--out", str(out), *extra])


def test_inspect_refuses_a_folder_of_the_users_unless_overwrite(folder, tmp_path, capsys, no_work):
    mine = tmp_path / "mine"
    mine.mkdir()
    (mine / "notes.txt").write_text("my notes\n")
    (mine / "warps.csv").write_text("my own table\n")  # a name the report would write
    before = _snapshot(mine)
    assert _inspect(folder, mine) == 2
    err = _errors(capsys.readouterr().err)
    assert err == [f"splice inspect: error: report folder '{mine}' holds notes.txt, warps.csv, not a report 'splice "
                   "inspect' wrote, and the report's files would go among them; choose another --out folder, or "
                   "pass --overwrite (overwrite=True) to write them there"]
    assert _snapshot(mine) == before
    with pytest.raises(SpliceError, match="not a report 'splice inspect' wrote"):
        splice.inspect(str(folder), data="digits-moved", n=4, out=mine, pictures=False)
    assert _snapshot(mine) == before


def test_inspect_overwrite_writes_beside_the_users_files(folder, tmp_path, capsys):
    mine = tmp_path / "mine"
    mine.mkdir()
    (mine / "notes.txt").write_text("my notes\n")
    assert _inspect(folder, mine, "--overwrite") == 0
    capsys.readouterr()
    assert (mine / "notes.txt").read_text() == "my notes\n"
    summary = json.loads((mine / "summary.json").read_text())
    assert summary["format"] == "splice-inspect-report" and summary["n_images"] == 4


def test_inspect_replaces_its_own_earlier_report(folder, tmp_path):
    out = tmp_path / "report"
    first = splice.inspect(str(folder), data="digits-moved", n=4, out=out, pictures=False)
    assert first["format"] == "splice-inspect-report"
    again = splice.inspect(str(folder), data="digits-moved", n=6, out=out, pictures=False)
    assert again["n_images"] == 6 and json.loads((out / "summary.json").read_text())["n_images"] == 6


def test_inspect_refuses_a_file_and_a_folder_inside_the_data(folder, tmp_path, no_work):
    notes = tmp_path / "notes.txt"
    notes.write_text("keep\n")
    with pytest.raises(SpliceError, match=f"report folder '{notes}' is a file; give a folder name"):
        splice.inspect(str(folder), data="digits-moved", out=notes)
    data = tmp_path / "images"
    data.mkdir()
    with pytest.raises(SpliceError, match="which this command reads images from"):
        splice.inspect(str(folder), data=str(data), out=data / "report", overwrite=True)
    assert notes.read_text() == "keep\n" and list(data.iterdir()) == []


# ----------------------------------------------------------------------------- verify --report, recipes


def test_verify_report_replaces_only_a_certificate(folder, tmp_path, capsys, monkeypatch):
    import splice.verification as verification

    before = _snapshot(folder)
    ran = []
    monkeypatch.setattr(verification, "verify", lambda *a, **k: ran.append(a) or pytest.fail("verify ran"))
    assert main(["verify", str(folder), "--report", str(folder / "splice.json")]) == 2
    err = _errors(capsys.readouterr().err)
    assert len(err) == 1 and err[0].startswith(f"splice verify: error: --report target '{folder / 'splice.json'}' "
                                               "exists and is not a certificate splice wrote")
    assert _snapshot(folder) == before and ran == []
    monkeypatch.undo()
    cert = tmp_path / "certificate.json"
    assert main(["verify", str(folder), "--report", str(cert)]) == 0
    assert main(["verify", str(folder), "--report", str(cert), "--seed", "3"]) == 0  # its own: replaced
    capsys.readouterr()
    assert json.loads(cert.read_text())["seed"] == 3


def test_dump_recipe_replaces_only_a_toml(tmp_path):
    from splice.recipes import dump_recipe, load_recipe

    script = tmp_path / "train.py"
    script.write_text("print('mine')\n")
    with pytest.raises(SpliceError, match="recipe target .* exists and is not a .toml file"):
        dump_recipe(load_recipe("joint"), script)
    assert script.read_text() == "print('mine')\n"
    earlier = tmp_path / "joint.TOML"
    earlier.write_text("# an earlier dump\n")
    dump_recipe(load_recipe("joint"), earlier)
    assert load_recipe(earlier).name == load_recipe("joint").name
