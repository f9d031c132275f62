"""One reusable harness for splices: ``check_splice`` asserts the four promises.

1. the traced model equals the eager model exactly;
2. the spliced model equals the base at the identity (float32: 1e-5 of the
   output's scale; float64: 1e-10 — the identity grid reproduces pixel centres,
   so only rounding remains);
3. every new parameter gets a gradient (the final layer of each head at the
   identity; every head parameter once the warp is off the identity);
4. neither the input nor the source model was changed: every buffer bit for
   bit (``num_batches_tracked`` and non-persistent buffers included), every
   parameter by hash, and every module's train/eval mode.
"""

from __future__ import annotations

import copy

import torch
from torch import nn

from splice import graph
from splice.fileio import state_dict_sha256
from splice.copies import buffer_snapshot, changed_buffers
from splice.surgery import insert, warps_of
from splice.compare import compare_outputs

__all__ = ["check_splice", "perturb_warps_"]

TOL = {torch.float32: 1e-5, torch.float64: 1e-10}


def perturb_warps_(model, scale: float = 0.05, seed: int = 0) -> None:
    """Move every warp off the identity by a small random amount (in place)."""
    gen = torch.Generator().manual_seed(seed)
    for warp in warps_of(model).values():
        final = [m for m in warp.head.modules() if isinstance(m, torch.nn.Linear)][-1]
        with torch.no_grad():
            final.weight.add_(scale * torch.randn(final.weight.shape, generator=gen, dtype=final.weight.dtype))
            final.bias.add_(scale * torch.randn(final.bias.shape, generator=gen, dtype=final.bias.dtype))


def check_splice(model, input_shape, at, warp="affine", *, dtype=torch.float32, batch=2, **insert_kw):
    """Splice ``model`` and assert the four promises; return the spliced model."""
    model = model.to(dtype).eval()
    before = state_dict_sha256(model.state_dict())
    buffers = buffer_snapshot(model)
    modes = [m.training for m in model.modules()]
    x = torch.randn((batch, *input_shape), dtype=dtype)
    x_copy = x.clone()

    # 1. traced == eager, exactly
    with torch.no_grad():
        eager = copy.deepcopy(model)(x)  # the harness itself never runs the source model
        traced = graph.trace(model)(x)
    traced_cmp = compare_outputs(eager, traced, tol=0.0)
    assert traced_cmp["passed"], f"fx trace differs from eager: {traced_cmp['detail']}"

    # 2. spliced == base at the identity
    spliced = insert(model, at=at, warp=warp, input_shape=input_shape, check=False, **insert_kw).eval()
    with torch.no_grad():
        out = spliced(x)
    cmp = compare_outputs(eager, out, tol=TOL[dtype])
    assert cmp["passed"], f"spliced output differs at the identity: {cmp['detail']}"
    if cmp["top1"] is not None:
        assert cmp["top1"] == 1.0
    base_keys = set(model.state_dict())
    spliced_keys = set(spliced.state_dict())
    assert base_keys <= spliced_keys
    assert all(k.startswith("splice_warps.") for k in spliced_keys - base_keys)

    # 3. gradients reach every head
    warps = warps_of(spliced)
    assert warps, "no warp was inserted"
    spliced.train()
    _backward(spliced, x)
    for name, w in warps.items():
        final = [m for m in w.head.modules() if isinstance(m, torch.nn.Linear)][-1]
        assert final.weight.grad is not None and final.weight.grad.abs().sum() > 0, f"{name}: no gradient at identity"
    moved = copy.deepcopy(spliced)
    perturb_warps_(moved)
    moved.zero_grad(set_to_none=True)
    _backward(moved, x)
    for name, w in warps_of(moved).items():
        for pname, p in w.named_parameters():
            assert p.grad is not None and bool(p.grad.abs().sum() > 0), f"{name}.{pname} got no gradient"
    spliced.eval()

    # 4. input and source untouched
    assert torch.equal(x, x_copy)
    assert state_dict_sha256(model.state_dict()) == before
    assert changed_buffers(buffers, model) == [], "splicing changed the source model's buffers"
    assert [m.training for m in model.modules()] == modes, "splicing changed the source model's modes"
    return spliced


def _backward(model, x):
    from splice.compare import flatten_outputs

    out = model(x)
    loss = sum(t.float().pow(2).mean() for t in flatten_outputs(out).values() if t.is_floating_point())
    loss.backward()


def by_name(pts):
    """Points by name."""
    return {p.name: p for p in pts}


# input -> stem -> conv_a -> act -> conv_b -> add(stem, conv_b) -> head -> output
# The skip stem -> add bypasses conv_a, act and conv_b, so every path from the
# input passes through: input, stem, add, head (cuts). conv_a, act, conv_b lie
# between the fork (stem) and the join (add): in_branch with join 'add'.
# Between convs (a conv upstream or itself, and one downstream): stem, conv_a,
# act, conv_b, add; head is the last conv, so only all=True lists it.
class Residual(nn.Module):
    def __init__(self):
        super().__init__()
        self.stem = nn.Conv2d(3, 8, 3, padding=1)
        self.conv_a = nn.Conv2d(8, 8, 3, padding=1)
        self.act = nn.ReLU()
        self.conv_b = nn.Conv2d(8, 8, 3, padding=1)
        self.head = nn.Conv2d(8, 4, 1)

    def forward(self, x):
        y = self.stem(x)
        return self.head(y + self.conv_b(self.act(self.conv_a(y))))
