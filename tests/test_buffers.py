"""Nothing splice does changes the caller's model, buffers included; the certificate holds on models that
update buffers in their forward (a BatchNorm fused with an activation, a call counter) and on graphs whose
tracer lifts constants."""

from __future__ import annotations

import copy

import warnings

import pytest
import torch
from torch import nn

import splice
from splice import graph
from splice.copies import bitwise_equal, buffer_snapshot, changed_buffers, private_buffers
from splice.exporting import export
from splice.store import save
from splice.surgery import insert
from splice.verification import verify

from harness import check_splice


class _CountingBNAct(nn.BatchNorm2d):
    """A BatchNorm fused with an activation that counts batches itself in a train-mode forward, reading
    self.training in code the tracer sees (the pattern of timm's BatchNormAct2d)."""

    def forward(self, x):
        if self.training and self.num_batches_tracked is not None:
            self.num_batches_tracked.add_(1)
        x = nn.functional.batch_norm(x, self.running_mean, self.running_var, self.weight, self.bias,
                                     self.training, 0.1, self.eps)
        return torch.relu(x)


class _CallCounter(nn.Module):
    """Counts its calls in a buffer, in every mode."""

    def __init__(self):
        super().__init__()
        self.register_buffer("calls", torch.zeros((), dtype=torch.long))

    def forward(self, x):
        self.calls += 1
        return x


class _Net(nn.Module):
    def __init__(self):
        super().__init__()
        self.conv1 = nn.Conv2d(3, 8, 3, stride=2, padding=1)
        self.bn = _CountingBNAct(8)
        self.count = _CallCounter()
        self.conv2 = nn.Conv2d(8, 8, 3, stride=2, padding=1)
        self.conv3 = nn.Conv2d(8, 4, 3, padding=1)

    def forward(self, x):
        return self.conv3(self.conv2(self.count(self.bn(self.conv1(x))))).mean((2, 3))


class _ConstNet(nn.Module):
    """A forward that makes a tensor constant: torch.fx lifts it as ``_tensor_constant0``."""

    def __init__(self):
        super().__init__()
        self.conv1 = nn.Conv2d(3, 4, 3, padding=1)
        self.conv2 = nn.Conv2d(4, 4, 3, padding=1)

    def forward(self, x):
        offset = torch.arange(4, dtype=torch.float32).reshape(1, 4, 1, 1)
        return self.conv2(self.conv1(x) + offset).mean((2, 3))


def counting_net():
    return _Net()


def const_net():
    return _ConstNet()


counting_net.input_shape = (3, 32, 32)
const_net.input_shape = (3, 16, 16)
NET = f"{__file__}:counting_net"
CONST = f"{__file__}:const_net"


def _modes(model):
    return [m.training for m in model.modules()]


def test_private_buffers_shares_parameters_and_copies_buffers():
    model = _Net()
    twin = private_buffers(model)
    assert twin.conv1.weight is model.conv1.weight
    assert twin.bn.running_mean is not model.bn.running_mean
    assert bitwise_equal(twin.bn.running_mean, model.bn.running_mean)
    twin.train()(torch.randn(2, 3, 8, 8))
    twin.register_forward_hook(lambda *a: None)
    assert not model._forward_hooks  # hooks on the twin never reach the caller's modules
    assert int(model.count.calls) == 0 and int(model.bn.num_batches_tracked) == 0
    assert int(twin.count.calls) == 1 and int(twin.bn.num_batches_tracked) == 1
    assert _modes(model) == [True] * len(_modes(model))  # a fresh module is in train mode; the twin's eval is its own
    twin.eval()
    assert model.training


def test_private_buffers_keeps_a_buffer_under_two_names_one_tensor():
    model = nn.Sequential(nn.BatchNorm2d(2))
    model.add_module("again", model[0])
    twin = private_buffers(model)
    assert twin[0].running_mean is twin.again.running_mean


@pytest.mark.parametrize("train", [False, True], ids=["eval", "train"])
def test_points_trace_and_insert_leave_the_caller_alone(train):
    model = _Net().train(train)
    before, modes = buffer_snapshot(model), _modes(model)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        splice.points(model, (3, 32, 32), all=True)
        graph.trace(model)
        spliced = insert(model, at="recommended", input_shape=(3, 32, 32))
    assert changed_buffers(before, model) == []
    assert _modes(model) == modes
    # the splice holds the caller's buffers, not ones counted while tracing
    got = {k: v for k, v in spliced.named_buffers() if k in before}
    assert got.keys() == before.keys() and all(bitwise_equal(before[k], got[k]) for k in got)


def test_the_harness_promises_hold_for_models_that_update_buffers():
    check_splice(_Net(), (3, 32, 32), at="recommended")


def test_a_module_that_updates_its_buffers_stays_a_step_of_its_own():
    # traced through, the counter would count once while tracing and never again
    spliced = insert(_Net(), at="recommended", input_shape=(3, 32, 32))
    assert "bn" in dict(spliced.named_children()) and "count" in dict(spliced.named_children())
    assert any(n.op == "call_module" and n.target == "count" for n in spliced.graph.nodes)
    base = _Net()
    with torch.no_grad():
        for model in (base, spliced):
            model.train()(torch.randn(2, 3, 32, 32))
            model.eval()(torch.randn(1, 3, 32, 32))
    assert int(spliced.count.calls) == int(base.count.calls) == 2
    assert int(spliced.bn.num_batches_tracked) == int(base.bn.num_batches_tracked) == 1


def test_a_fresh_splice_of_a_buffer_updating_model_passes_verify(tmp_path):
    folder = save(insert(NET, at="recommended"), tmp_path / "net")
    report = verify(folder, trust_code=True)  # the test model comes from a .py factory it wrote
    assert report.passed, report.failed
    assert report["provenance"].passed
    # the call counter counts even in eval mode: the checks ran on copies and say so
    assert any(k.endswith("count.calls") for k in report["buffers"].numbers["updated_in_eval"])
    # verify built both models itself: the row says what it checked, copies of the folder's buffers
    assert report["buffers"].detail.startswith("the checks ran on copies of the ")


class _Caching(nn.Module):
    """Keeps Python state that its forward changes: a cache of grids by input size and a call log; with
    ``branch``, a branch on a shape too (fx cannot trace it: the hooks mechanism takes over)."""

    def __init__(self, branch: bool = False):
        super().__init__()
        self.branch = branch
        self.conv = nn.Conv2d(3, 8, 3, padding=1)
        self.head = nn.Conv2d(8, 4, 3, stride=2, padding=1)
        self.grids: dict = {}
        self.log: list = []
        self.shared = self.log  # one list under two names

    def forward(self, x):
        size = tuple(x.shape[-2:])
        if size not in self.grids:
            self.grids[size] = torch.zeros(1)
        self.log.append(size)
        if self.branch and x.shape[-1] < 4:
            raise ValueError("too small")
        return self.head(torch.relu(self.conv(x))).mean((2, 3))


def caching_net():
    return _Caching()


def caching_branchy_net():
    return _Caching(branch=True)


caching_net.input_shape = caching_branchy_net.input_shape = (3, 16, 16)


def test_private_buffers_owns_the_python_state_a_forward_changes():
    model = _Caching()
    model.pair = [model.conv, model.head.weight]  # modules and parameters inside a plain container
    twin = private_buffers(model)
    with torch.no_grad():
        twin(torch.randn(1, 3, 8, 8))
    assert model.grids == {} and model.log == [] and twin.log == [(8, 8)]
    assert twin.shared is twin.log  # shared within the twin as in the model
    assert twin.pair[0] is twin.conv and twin.pair[1] is model.head.weight  # the twin's module, the shared weight


@pytest.mark.parametrize("factory", ["caching_net", "caching_branchy_net"], ids=["fx", "hooks"])
def test_splice_never_changes_the_python_state_of_the_callers_model(factory):
    from splice.verification import verify_models

    model = globals()[factory]().eval()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        splice.points(model, (3, 16, 16), all=True)
        spliced = insert(model, at="recommended", input_shape=(3, 16, 16))
        report = verify_models(model, spliced)
    assert report.passed, report.failed
    assert model.grids == {} and model.log == [] and model.shared is model.log


def test_lifted_constants_stay_out_of_the_state_dict():
    gm = graph.trace(_ConstNet())
    assert "_tensor_constant0" in dict(gm.named_buffers())
    assert "_tensor_constant0" not in gm.state_dict()
    assert set(gm.state_dict()) == set(_ConstNet().state_dict())


class _ConstReadsMode(_ConstNet):
    """Reads ``self.training`` without changing its graph: the train-mode trace of the same root numbers its
    lifted constant after the eval-mode trace's."""

    def forward(self, x):
        scale = 1.0 if self.training else 1.0
        return super().forward(x) * scale


def test_lifted_constants_do_not_make_the_two_modes_differ():
    with warnings.catch_warnings():
        warnings.simplefilter("error", graph.TraceModeWarning)
        gm = graph.trace(_ConstReadsMode())
    assert [n.target for n in gm.graph.nodes if n.op == "get_attr"] == ["_tensor_constant0"]


def test_lifted_constants_do_not_break_verify_or_export(tmp_path):
    # a folder whose traced graph lifts constants verifies and exports alike
    folder = save(insert(CONST, at="conv1"), tmp_path / "const")
    report = verify(folder, onnx=True, trust_code=True)
    assert report.passed, [(r.check, r.detail) for r in report.checks if not r.passed]
    result = export(folder, onnx=tmp_path / "const.onnx", trust_code=True)
    assert result["exports"][0]["max_abs"] <= 1e-5


@pytest.mark.slow
def test_timm_fused_batchnorm_models_keep_provenance(tmp_path):
    src = splice.load_source("timm:efficientnet_b0", kwargs={"num_classes": 5}, input_shape=(3, 32, 32))
    before = buffer_snapshot(src.model)
    splice.points(src.model, (3, 32, 32))
    assert changed_buffers(before, src.model) == []
    folder = save(insert(src, at="recommended"), tmp_path / "effnet")
    assert changed_buffers(before, src.model) == []
    report = verify(folder)  # timm:NAME is a registry kind: no code opt-in needed
    assert report["provenance"].passed, report["provenance"].detail
    assert report.passed, report.failed


class _OwnCopy(nn.Module):
    """Copies itself its own way: tree_copy must leave that to copy.deepcopy."""

    copies = 0

    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(2, 2, 1)

    def forward(self, x):
        return self.conv(x)

    def __deepcopy__(self, memo):
        type(self).copies += 1
        fresh = _OwnCopy()
        fresh.load_state_dict(self.state_dict())
        return fresh


class _Restores(nn.Conv2d):
    """Has its own __setstate__ (as convolutions do): deepcopy and tree_copy both run it on the copied state."""

    def __setstate__(self, state):
        super().__setstate__(state)
        self.restored = self.__dict__.get("restored", 0) + 1


class _Tree(nn.Module):
    def __init__(self):
        super().__init__()
        self.shared = nn.Conv2d(2, 2, 3, padding=1)
        self.pair = nn.ModuleList([self.shared, nn.BatchNorm2d(2)])  # one module under two names
        self.other = nn.Conv2d(2, 2, 3, padding=1)
        self.other.weight = self.shared.weight  # tied
        self.own = _OwnCopy()
        self.restores = _Restores(2, 2, 1)
        self.notes = ["a"]
        self.table = {"k": [1, 2]}
        self.register_buffer("steps", torch.zeros(()), persistent=False)
        self.seen = []
        self.shared.register_forward_hook(lambda m, a, o: None)

    def forward(self, x):
        return self.own(self.other(self.pair[1](self.shared(x))))


def test_tree_copy_is_a_deep_copy():
    from splice.copies import tree_copy

    model = _Tree().eval()
    before = _OwnCopy.copies
    ours, theirs = tree_copy(model), copy.deepcopy(model)
    assert _OwnCopy.copies == before + 2  # the module with its own __deepcopy__ was copied its way both times
    assert [(n, type(m)) for n, m in ours.named_modules()] == [(n, type(m)) for n, m in theirs.named_modules()]
    assert ours.pair[0] is ours.shared and ours.other.weight is ours.shared.weight  # sharing kept
    assert ours.restores.restored == theirs.restores.restored == 1 and not hasattr(model.restores, "restored")
    assert list(ours.shared._forward_hooks) == list(model.shared._forward_hooks)
    mine = {id(t) for t in (*model.parameters(), *model.buffers())}
    assert not mine & {id(t) for t in (*ours.parameters(), *ours.buffers())}
    ours.notes.append("b")
    ours.table["k"].append(3)
    ours.shared._forward_hooks.clear()
    assert model.notes == ["a"] and model.table == {"k": [1, 2]} and len(model.shared._forward_hooks) == 1
    assert ours._non_persistent_buffers_set == {"steps"} and ours._non_persistent_buffers_set is not \
        model._non_persistent_buffers_set
    x = torch.randn(1, 2, 5, 5)
    with torch.no_grad():
        assert torch.equal(ours(x), model(x)) and torch.equal(theirs(x), model(x))
    # a memo swaps tensors, as with copy.deepcopy (how the meta twins are made)
    memo = {id(p): nn.Parameter(torch.empty(p.shape, device="meta")) for p in model.parameters()}
    meta = tree_copy(model, memo)
    assert all(p.is_meta for n, p in meta.named_parameters() if not n.startswith("own."))


def test_the_collector_is_paused_in_the_block_and_left_as_it_was():
    import gc

    from splice.copies import collector_paused

    assert gc.isenabled()
    with collector_paused():
        assert not gc.isenabled()
    assert gc.isenabled()
    with pytest.raises(ZeroDivisionError), collector_paused():
        1 / 0
    assert gc.isenabled()  # an error in the block does not leave it off
    gc.disable()
    try:
        with collector_paused():
            pass
        assert not gc.isenabled()  # a caller who turned it off keeps it off
    finally:
        gc.enable()


class _OwnSetState(nn.Module):
    """Fixes up its state when it is restored, as convolutions do (``padding_mode``)."""

    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(2, 2, 1)
        self.items = [1]

    def __setstate__(self, state):
        super().__setstate__(state)
        self.restored = getattr(self, "restored", 0) + 1

    def forward(self, x):
        return self.conv(x)


class _NewArgs(_OwnSetState):
    def __getnewargs__(self):
        return ()


def test_tree_copy_restores_a_module_by_its_own_setstate_as_deepcopy_does():
    from splice import copies

    assert copies._plain_module_class(nn.Conv2d) and copies._plain_module_class(_OwnSetState)
    assert not copies._plain_module_class(_NewArgs)  # a reduction with arguments is left to copy.deepcopy
    for cls in (_OwnSetState, _NewArgs):
        model = nn.Sequential(cls(), cls())
        ours, theirs = copies.tree_copy(model), copy.deepcopy(model)
        for a, b, orig in zip(ours, theirs, model):
            assert a.restored == b.restored == 1 and not hasattr(orig, "restored")
            assert a.items == orig.items and a.items is not orig.items
            assert a.conv.padding_mode == orig.conv.padding_mode and a.conv.weight is not orig.conv.weight
            assert torch.equal(a.conv.weight, orig.conv.weight)


class _Tally(nn.Module):
    """A leaf that counts its calls in a plain tensor attribute (not a registered buffer)."""

    def __init__(self):
        super().__init__()
        self.conv = nn.Conv2d(3, 3, 1)
        self.seen = torch.zeros(())

    def forward(self, x):
        self.seen.add_(1)
        return self.conv(x)


def test_listing_never_updates_a_plain_tensor_attribute_of_an_opaque_leaf():
    # shapes are propagated through a leaf on a stand-in; its tensor attributes are meta there, so the count
    # in the caller's tensor stays where it was
    model = nn.Sequential(nn.Conv2d(3, 3, 3, padding=1), _Tally(), nn.Conv2d(3, 3, 3, padding=1)).eval()
    splice.points(model, (3, 8, 8), leaves=[_Tally])
    assert float(model[1].seen) == 0.0


def test_a_twin_of_a_graph_module_shares_its_graph_and_owns_its_buffers():
    spliced = insert(_Net(), at="recommended", input_shape=(3, 32, 32))
    code, modes = spliced.code, _modes(spliced)
    twin = private_buffers(spliced)
    assert twin.graph is spliced.graph  # running a GraphModule never touches its graph: not copied
    before = buffer_snapshot(spliced)
    with torch.no_grad():
        twin.train()(torch.randn(2, 3, 32, 32))
    assert changed_buffers(before, spliced) == []
    assert int(twin.count.calls) == 1 and int(twin.bn.num_batches_tracked) == 1
    assert spliced.code == code and _modes(spliced) == modes


@pytest.mark.parametrize("wrap", [nn.utils.weight_norm, nn.utils.spectral_norm])
def test_classic_weight_reparametrisations_are_spliced(wrap):
    # their hooks keep the weight computed from parameters on the module, which deepcopy refuses ("cannot copy
    # ... make the model deep-copyable"); a copy holds it detached, and the hook computes it again on every call
    from splice.verification import verify_models

    torch.manual_seed(0)
    model = nn.Sequential(wrap(nn.Conv2d(3, 4, 3, padding=1)), nn.ReLU(), nn.Conv2d(4, 4, 3, padding=1),
                          nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(4, 3)).eval()
    model(torch.rand(1, 3, 8, 8))  # an eval forward with grad on: the weight it keeps is part of a graph
    before = {k: v.clone() for k, v in model.state_dict().items()}
    spliced = insert(model, at="input", input_shape=(3, 8, 8))
    x = torch.rand(2, 3, 8, 8)
    with torch.no_grad():
        assert torch.equal(spliced(x), model(x))
    assert verify_models(model, spliced).passed
    assert all(torch.equal(before[k], v) for k, v in model.state_dict().items())


def test_tree_copy_keeps_one_copy_of_a_computed_tensor_held_twice():
    # the memo lookup asked a tensor for its truth value ("ambiguous") the second time it met the same one
    from splice.copies import tree_copy

    m = nn.Linear(3, 3)
    m.cached = m.weight * 2  # computed from a parameter: part of an autograd graph
    m.again = m.cached
    c = tree_copy(m)
    assert c.cached is c.again and not c.cached.requires_grad and torch.equal(c.cached, m.cached.detach())
