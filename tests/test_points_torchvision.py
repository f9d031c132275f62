"""points() on torchvision classifiers (random weights), checked against real forwards.

References used here:
- shapes: a real forward of the traced model (torch.fx.Interpreter running the
  actual kernels on a batch of two 3x224x224 images), and forward hooks on the
  eager torchvision model for every module output;
- cuts and joins: networkx on the same data-flow graph (a point is a cut iff
  removing it disconnects the input from the output, ``networkx.has_path``;
  joins from ``networkx.immediate_dominators`` on the reversed graph).
"""

from __future__ import annotations

import pytest
import torch
import torch.fx as fx
import torchvision

from splice import graph
from splice.warps import Warp, WarpConfig

networkx = pytest.importorskip("networkx")

_SHAPE = (3, 224, 224)
_FAST = ["resnet18", "mobilenet_v3_small"]
_SLOW = ["resnet50", "efficientnet_b0", "densenet121", "vgg11", "convnext_tiny", "regnet_y_400mf"]


def _real_values(gm: fx.GraphModule, x: torch.Tensor) -> tuple[dict[fx.Node, object], object]:
    values: dict[fx.Node, object] = {}

    class Recorder(fx.Interpreter):
        def run_node(self, n):
            out = super().run_node(n)
            values[n] = out
            return out

    with torch.no_grad():
        out = Recorder(gm).run(x)
    return values, out


def _hook_shapes(model: torch.nn.Module, x: torch.Tensor) -> tuple[dict[str, tuple[int, ...]], object]:
    shapes: dict[str, tuple[int, ...]] = {}
    handles = []
    for qualname, mod in model.named_modules():
        if not qualname:
            continue

        def hook(mod, args, out, qualname=qualname):
            if isinstance(out, torch.Tensor):
                shapes.setdefault(qualname, tuple(out.shape))  # first call only

        handles.append(mod.register_forward_hook(hook))
    try:
        with torch.no_grad():
            out = model(x)
    finally:
        for h in handles:
            h.remove()
    return shapes, out


def _reference_cuts(gm: fx.GraphModule, values) -> tuple[dict[str, bool], dict[str, str | None]]:
    """Cut flag and join for every tensor node, computed with networkx from the definition."""
    name = {node: key for key, node in graph.point_names(gm).items()}
    out_node = next(n for n in gm.graph.nodes if n.op == "output")
    g = networkx.DiGraph()
    keep = {n for n in gm.graph.nodes if n.op not in ("get_attr", "output") and isinstance(values.get(n), torch.Tensor)}
    keep.add(out_node)
    for n in keep:
        g.add_node(n)
        for p in n.all_input_nodes:
            if p in keep:
                g.add_edge(p, n)
    src = next(n for n in gm.graph.nodes if n.op == "placeholder")
    on_path = networkx.descendants(g, src) & networkx.ancestors(g, out_node)
    g = g.subgraph(on_path | {src, out_node}).copy()
    cut = {}
    for n in g.nodes:
        if n is out_node:
            continue
        if n is src:
            cut[n] = True
            continue
        cut[n] = not networkx.has_path(networkx.restricted_view(g, [n], []), src, out_node)
    ipdom = networkx.immediate_dominators(g.reverse(copy=True), out_node)
    join = {}
    for n in cut:
        if cut[n]:
            join[n] = None
            continue
        p = ipdom[n]
        while p is not out_node and not cut[p]:
            p = ipdom[p]
        join[n] = None if p is out_node else name[p]
    return {name[n]: v for n, v in cut.items()}, {name[n]: v for n, v in join.items()}


def _check_model(arch: str) -> None:
    model = getattr(torchvision.models, arch)(weights=None).eval()
    every = graph.points(model, _SHAPE, all=True)
    default = graph.points(model, _SHAPE)
    again = graph.points(model, _SHAPE)

    # names are the same from one call to the next, and default is a subset of all
    assert [p.name for p in default] == [p.name for p in again]
    assert default == again
    by_name = {p.name: p for p in every}
    assert len(by_name) == len(every)
    assert all(by_name[p.name] == p for p in default)
    assert default[0].name == "input" and default[0].shape == _SHAPE

    # every listed shape matches a real forward (fx.Interpreter on real tensors, batch 2)
    x = torch.randn(2, *_SHAPE)
    gm = graph.trace(model)
    values, out = _real_values(gm, x)
    hooked, eager_out = _hook_shapes(model, x)
    torch.testing.assert_close(out, eager_out, rtol=0, atol=0)  # the trace is faithful
    label = {node: key for key, node in graph.point_names(gm).items()}
    real = {label[n]: v for n, v in values.items() if n in label}
    real4d = {k for k, v in real.items() if isinstance(v, torch.Tensor) and v.dim() == 4}
    assert set(by_name) <= real4d
    # the 4-D tensors left out are channels-last ones made by a permute (convnext's blocks)
    nodes = graph.point_names(gm)
    for name in real4d - set(by_name):
        ancestors, todo = {nodes[name]}, [nodes[name]]
        while todo:
            for p in todo.pop().all_input_nodes:
                if p not in ancestors:
                    ancestors.add(p)
                    todo.append(p)
        assert any(a.target == "permute" for a in ancestors), name
    assert (real4d == set(by_name)) == (arch != "convnext_tiny")
    for p in every:
        real_h, real_w = real[p.name].shape[2:]
        assert (2, *p.shape) == tuple(real[p.name].shape), p.name
        # at 224x224 these models only halve: stride = 224 / H, the same on both axes
        assert real_h == real_w and _SHAPE[1] % real_h == 0 and p.stride == _SHAPE[1] // real_h, p.name
    # and every module output seen by forward hooks on the eager model
    for p in every:
        if p.module and p.name == p.module.replace(".", "_"):
            assert (2, *p.shape) == hooked[p.module], p.name

    # cuts and joins agree with networkx on the same data-flow graph
    ref_cut, ref_join = _reference_cuts(gm, values)
    for p in every:
        assert p.cut == ref_cut[p.name], p.name
        assert p.join == ref_join[p.name], p.name
        assert p.in_branch == (ref_join[p.name] is not None), p.name

    # at least one recommended point, each a cut; the input is one of them
    rec = [p for p in default if p.recommended]
    assert 1 <= len(rec) <= 2 and all(p.cut for p in rec)
    assert rec[0].name == "input"
    assert [p.name for p in every if p.recommended] == [p.name for p in rec]
    for p in rec:  # what the default warp adds there, counted on the module itself
        assert p.warp_params == sum(t.numel() for t in Warp(WarpConfig(family="affine"), p.shape).parameters())


@pytest.mark.parametrize("arch", _FAST)
def test_points_torchvision(arch):
    _check_model(arch)


@pytest.mark.slow
@pytest.mark.parametrize("arch", _SLOW)
def test_points_torchvision_slow(arch):
    _check_model(arch)


def test_resnet18_listing_by_hand():
    # resnet18 (torchvision): stem conv1-bn1-relu-maxpool, then BasicBlocks whose
    # inner layers are bypassed by the identity (or downsample) path to the add.
    pts = {p.name: p for p in graph.points(torchvision.models.resnet18(weights=None), _SHAPE)}
    assert [n for n, p in pts.items() if p.recommended] == ["input"]
    assert pts["maxpool"].shape == (64, 56, 56) and pts["maxpool"].stride == 4
    # functional nodes are named after the module whose forward calls them
    assert pts["layer1_0_relu"].in_branch and pts["layer1_0_relu"].join == "layer1_0_add"
    assert pts["layer1_0_add"].cut and pts["layer1_0_relu_1"].cut
    assert pts["layer2_0_downsample_0"].join == "layer2_0_add"
    assert pts["layer4_1_relu"].shape == (512, 7, 7) and pts["layer4_1_relu"].stride == 32
    assert "layer4_1_relu_1" not in pts  # after the last conv: only with all=True
