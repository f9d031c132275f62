"""Acceptance: every architecture of the zoo (tests/zoo.py) passes the whole certificate — points, insert at
``recommended`` with ``affine``, verify with ONNX, export — built with random weights, nothing downloaded.
None is skipped: timm and transformers are in the test extra."""

from __future__ import annotations

import pytest

from zoo import ZOO, run_zoo_model


@pytest.fixture(scope="module")
def workdir(tmp_path_factory):
    return tmp_path_factory.mktemp("zoo")


@pytest.mark.slow
@pytest.mark.parametrize("entry", ZOO, ids=[e.id for e in ZOO])
def test_the_zoo_passes_the_whole_certificate(entry, workdir):
    result = run_zoo_model(entry, workdir)
    report = result["report"]
    assert report.passed, {r.check: r.detail for r in report.checks if not r.passed}
    assert [r.check for r in report.checks] == ["integrity", "finite", "shapes", "outputs", "warps", "provenance",
                                                "gradients", "onnx", "buffers"]
    assert not report["gradients"].warning, report["gradients"].detail  # the outputs depend on the input
    assert result["source_changed"] == [], "listing or splicing changed the source model"
    assert result["recommended"] == ["input"]  # the input first (README, "splice points", on recommended)
    assert result["spliced_at"][0] == "input" and len(result["spliced_at"]) == 2  # and one warp inside
    if entry.within:
        assert result["mechanism"] == "hooks" and report.meta["points"] == result["spliced_at"]
    exported = result["export"]
    assert exported["max_rel"] <= exported["tolerance"]
    # a graph for any batch is checked at 1 and 3, and at 5 and 9 too where torch.export meets a guard on the batch
    # (RAFT's cat-then-chunk of its two images, which holds for every batch)
    assert exported["batch_sizes"] in ([[1, 3], [1, 3, 5, 9]] if exported["dynamic_batch"] else [[1, 1]])
    # splice's warnings: which mechanism listed the points, and a batch-1 export when the graph needs one
    for category, message in result["warnings"]:
        if category == "TraceFallbackWarning":
            assert result["mechanism"] == "hooks" and "points come from" in message
        elif "not proven for every input" in message:  # the tracer fixed values the probes cannot prove
            assert exported.get("unproven"), message
        elif category != "TraceModeWarning":  # train and eval graphs differ: said, not an error
            assert not exported["dynamic_batch"] and "a static batch of 1 is exported instead" in message, message
