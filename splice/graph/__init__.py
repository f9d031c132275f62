"""Where a warp can go: fx tracing, meta-device shapes and cut analysis.

Tracing
-------
:func:`trace` runs :mod:`torch.fx` with a tracer that keeps two kinds of module
as single steps (*leaves*): fx's own rule (modules defined in ``torch.nn``,
except containers) and a registry of leaf types, which starts as
:data:`DEFAULT_LEAVES`, grows with :func:`register_leaf` (for the length of a
``with`` block with :func:`leaves_added`), and can be extended per call with
``leaves=``. A leaf is given as a class or as a dotted ``"pkg.mod.ClassName"``
string (a bare ``"ClassName"`` also matches), so that naming a leaf never has
to import its package.

The graph is traced in eval mode. Whenever traced code reads a module's
``training`` flag, the model is traced again in train mode and a
:class:`TraceModeWarning` is raised if the two graphs differ. Tracing works on
a private clone of the module tree that owns copies of the buffers
(:func:`splice.copies.private_buffers`): code that updates a buffer while it
is traced (a fused BatchNorm counting batches) never changes the caller's model.
Such a module is kept as a leaf (found by its buffers' version counters), so
the traced graph keeps updating its buffers as the model does. Code outside a
leaf that reads one of its buffers (a warm-up factor computed from a call
counter) reads it as a node of the graph, not as the value it held while
tracing, so the graph computes from the buffer at every call.

Points
------
A *point* is an fx node that produces an (N, C, H, W) tensor (tensors that a
permute or transpose turned channels-last, as in convnext blocks, are not
points). It is named
after the node, which fx derives from the module qualname (``layer1_0_relu``,
with ``_1``, ``_2`` for repeated calls); the model input is always ``input``.
By default :func:`points` lists ``input`` and the points that sit between
convolutions (a conv upstream or the point itself, and a conv downstream),
except 1x1 maps (the gate of a squeeze-and-excitation block), where a warp
has nothing to move; ``all=True`` lists every 4-D activation. Shapes come from one propagation on
the meta device (batch size 1): no activation memory, no arithmetic. Common
layers use closed-form shape rules; everything else runs its meta kernel. A
user-registered leaf that cannot run on the meta device (value-dependent
control flow) is run once, alone, on a CPU copy with an all-zeros input.

Cuts and branches
-----------------
The data-flow graph runs from the input to the output node (which gathers
every model output). A point is a *cut* when every path from the input to the
outputs passes through it: it dominates the output node and post-dominates
the input (Cooper, Harvey & Kennedy's iterative dominator algorithm, forwards
and backwards). A point that is not a cut but lies between a fork and the cut
where the paths meet again is *in a branch*; ``join`` names that meeting node
(the ``add`` of a residual block, the ``cat`` of a dense block). A point whose
paths only meet at the model outputs (one head of a two-headed model) is
neither. With several inputs the paths are the first input's and the other
inputs' paths into them (a second frame concatenated with the first, a skip
tensor added); what reaches the outputs apart from them (a detection
backbone's pixel mask) does not count.

Recommended points
------------------
splice recommends at most two points, both cuts that sit between convs: the
model ``input``, and the first point in graph order whose stride is at least 4
on both axes and whose feature map is at least 8x8. Stride 4 is where the stem
of common CNNs ends (a strided conv followed by a pool or a second strided
conv), so the second warp works on low-level features that still have spatial
detail; a cut means one warp sees the whole signal.

Strides
-------
A point's ``stride`` is the cumulative stride from the input: each op
multiplies the stride of the tensor it reads by its own, and a join keeps the
largest product over its inputs (:mod:`.strides`). Convs, pools, unpools,
upsamplings, pixel shuffles, slices and pads give their own from their
arguments (modules and functional forms alike); any other op from its sizes:
the integer whose floor or ceil division gives its output size, else the
exact ratio. So six stride-2 convs give 64 at 37x53 as at 64x64, where input
size / point size would give 37 and 53.

Where fx cannot trace: the hooks views
--------------------------------------
If fx cannot trace the model, :func:`points` warns (:class:`TraceFallbackWarning`)
and lists the points a forward hook can reach (mechanism ``"hooks"``, see
:mod:`splice.hooks`): tensors that one module call creates and hands back,
named after the module's qualname (``_1``, ``_2`` for repeat calls), each with
its *site* ``(qualname, call index)``. The data flow comes from one recorded
meta-device forward (:mod:`.recorded`), or, for a forward that needs real
values, from ``torch.export`` (:mod:`.exported`); the cut analysis is the
same. If both fail, module outputs of a meta forward are listed without a
data-flow graph (only ``input`` is a cut; :mod:`.fallback`). If that forward
fails too, :class:`~splice.errors.GraphError` names the failing module and how
to mark it as a leaf; leaves run alone, for real, in every one of these
passes. ``within="backbone"`` lists the hooks view of a submodule, called
with the inputs the model gives it (:mod:`.scope`).

Files
-----
``leaves`` (the leaf registry), ``tracing`` (the fx tracer, train/eval
comparison), ``lifted`` (constants the tracer lifts), ``shapes`` (meta-device propagation), ``cuts`` (dominators),
``naming`` (point names, lookup), ``strides`` (cumulative strides), ``entries`` (4-D activations between
convs), ``recorded``, ``exported`` and ``fallback`` (the hooks views),
``scope`` (``within``), ``listing`` (:class:`Point`, :func:`points`).
"""

from __future__ import annotations

from . import leaves as _leaves
from .fallback import TraceFallbackWarning
from .leaves import leaves_added, register_leaf
from .lifted import relink_lifted
from .listing import Point, points, points_report, trace_points
from .naming import find_point, point_names
from .tracing import GraphWarning, TraceModeWarning, trace

__all__ = [
    "DEFAULT_LEAVES",
    "GraphWarning",
    "TraceModeWarning",
    "TraceFallbackWarning",
    "Point",
    "register_leaf",
    "leaves_added",
    "trace",
    "relink_lifted",
    "points",
    "trace_points",
    "find_point",
    "point_names",
    "points_report",
]


def __getattr__(name: str):
    # DEFAULT_LEAVES imports the packages it names (torchvision): resolved on first access only
    if name == "DEFAULT_LEAVES":
        value = globals()[name] = _leaves.DEFAULT_LEAVES
        return value
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
