"""End to end: ``splice demo --fast`` runs the whole job and the warp pays.

The data is scikit-learn's bundled handwritten digits (UCI optdigits), placed
on a tray canvas by splice.data; the goal (joint-tuned splice beats the
fine-tuned control on moved parts) is the product's acceptance bar.
"""

from __future__ import annotations

import json

import pytest
from PIL import Image


@pytest.mark.slow
def test_demo_fast_end_to_end(tmp_path):
    from splice.cli import main

    out = tmp_path / "demo"
    assert main(["demo", "--fast", "--quiet", "--out", str(out)]) == 0
    report = (out / "report.md").read_text()
    summary = json.loads((out / "demo.json").read_text())
    # the report links pictures that exist and decode
    linked = [line.split("](")[1].rstrip(")") for line in report.splitlines() if line.startswith("![")]
    assert len(linked) >= 3
    for rel in linked:
        with Image.open(out / rel) as im:
            assert im.size[0] > 100 and im.size[1] > 100
    assert summary["verify"]["passed"], summary["verify"]
    assert json.loads((out / "spliced" / "certificate.json").read_text())["passed"]
    e = summary["errors"]
    assert e["joint"]["digits-moved"] < e["control"]["digits-moved"]
    assert e["warp-only"]["digits-moved"] < e["control"]["digits-moved"]
    # without a label the warp still reads moved parts far better than the base does
    assert e["label-free"]["digits-moved"] < e["base"]["digits-moved"]
    assert "label-free (no label read" in report and summary["label_free"]["ranges"]["rotation"] > 0
    # each labelled row says which epoch its best/ kept: the first best validation accuracy in its metrics
    for name in ("control", "warp-only", "joint"):
        rows = [json.loads(line) for line in (out / name / "metrics.jsonl").read_text().splitlines()]
        scored = [(r["accuracy"], -r["epoch"]) for r in rows if r.get("accuracy") is not None]
        assert summary["best_epochs"][name] == -max(scored)[1]
    assert "| kept epoch |" in report
    # the rerun replaces a previous demo folder, but never a foreign one
    (tmp_path / "foreign").mkdir()
    (tmp_path / "foreign" / "keep.txt").write_text("mine")
    assert main(["demo", "--fast", "--quiet", "--out", str(tmp_path / "foreign")]) == 2
    assert (tmp_path / "foreign" / "keep.txt").exists()


def test_the_demo_gives_the_caller_its_warning_filters_back(tmp_path, monkeypatch):
    import warnings

    import splice.demo as demo_module

    def stop(run):
        raise RuntimeError("stop after the filters are set")

    monkeypatch.setattr(demo_module, "_base", stop)
    with warnings.catch_warnings():
        warnings.resetwarnings()
        warnings.simplefilter("error")  # the caller's choice: every warning an error
        before = list(warnings.filters)
        with pytest.raises(RuntimeError, match="stop after"):
            demo_module.demo(tmp_path / "demo", fast=True, quiet=True)
        assert warnings.filters == before
