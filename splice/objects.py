"""Spliced models in memory, and those whose base was a module object rather than a spec.

``splice.insert(model)`` with an ``nn.Module`` records its base as
:data:`MODULE_SPEC`: only the caller's Python knows how that module was made,
so no folder can rebuild it. Such a splice is checked and exported in memory:

- :func:`splice.manifest.remember_base` (re-exported here) keeps the
  caller's base module (not a copy) alive while the splice lives, beside the
  record the splice carries, so that a base the caller holds no name for
  (``splice.insert(Net())``) can still be compared with;
- :func:`base_to_check_against` is the base :func:`splice.verify` compares
  with: the one remembered, provided its weights still hash to those
  recorded when it was spliced; else one line says what to do (hand the
  base to :func:`splice.verification.verify_models`);
- :func:`respecified` records a spec for it when the caller names one
  (``splice.save(model, folder, source="pkg.module:factory")``), after
  checking that the splice rebuilt on it gives the same outputs;
- :func:`cannot_rebuild` is the error a folder recording
  :data:`MODULE_SPEC` gives instead of a build that cannot work.

:func:`source_of_spliced` makes a :class:`~splice.sources.Source` from a
spliced model's own record, for commands handed one in memory.

Layer: beside :mod:`splice.surgery` (whose probe comparison it uses), above
:mod:`splice.manifest` and :mod:`splice.sources`, below :mod:`splice.store`
and :mod:`splice.api`.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from torch import nn

from .copies import rng_kept
from .errors import ManifestError, SpliceError, first_line
from .fileio import state_dict_sha256
from .manifest import SpliceInfo, info_of, remember_base, remembered_base
from .sources import MODULE_SPEC, Source, load_source, parse_input_shapes
from .surgery import base_state_dict, quick_check

__all__ = ["MODULE_SPEC", "remember_base", "made_from_object", "base_to_check_against", "respecified",
           "cannot_rebuild", "source_of_spliced"]

_BY_HAND = "check it with splice.verification.verify_models(base, spliced), the base as it was when spliced"


def made_from_object(model: Any) -> bool:
    """``model`` is a spliced model in memory whose record names :data:`MODULE_SPEC` (no folder rebuilds it)."""
    info = info_of(model) if isinstance(model, nn.Module) else None
    return info is not None and info.spec == MODULE_SPEC


def base_to_check_against(spliced: nn.Module) -> nn.Module | None:
    """The module to verify ``spliced`` against in memory, or ``None`` when its record names a spec (a folder
    can rebuild its base, and the checks run on what would be written).

    For a splice of a module object: the module it was made from, if that is
    still alive and still holds the weights recorded when it was spliced
    (same sha256); else the comparison would say nothing about the splice.
    """
    if not made_from_object(spliced):
        return None
    info = info_of(spliced)
    base = remembered_base(spliced)
    if base is None:
        raise SpliceError(f"this splice was made from a module object, and splice holds no reference to it for "
                          f"this model (it is a copy: deepcopy and pickle do not carry the base); {_BY_HAND}")
    if info.source_weights_sha256 and state_dict_sha256(base.state_dict()) != info.source_weights_sha256:
        raise SpliceError(f"the module this splice was made from has changed since (its weights no longer hash to "
                          f"those recorded); {_BY_HAND}")
    return base


@rng_kept()
def respecified(info: SpliceInfo, spliced: nn.Module, source: Any, assemble: Callable) -> SpliceInfo:
    """``info`` with the spec (and builder options) of ``source`` in place of :data:`MODULE_SPEC`, once that
    spec is shown to rebuild ``spliced``.

    ``source`` is a spec string or a :class:`~splice.sources.Source`. What it
    builds must have the splice's base tensors, name for name and shape for
    shape; then the recorded splice is applied to it (``assemble``, the
    store's own rebuild), it takes the splice's weights, and its outputs on a
    seeded probe must match ``spliced``'s: a network with the same tensors
    and another forward would load, and pass every check, as a different
    model. The caller's random generators are kept.
    """
    src = (load_source(source, warn_random=False, input_shape=[tuple(s) for s in info.input_shapes])
           if isinstance(source, str) else source)
    if not isinstance(src, Source) or src.spec == MODULE_SPEC:
        raise SpliceError("save(source=...) needs a spec string or a Source made from one, to record how the base "
                          "is built; a module object cannot be rebuilt from a folder")
    want = {k: tuple(v.shape) for k, v in base_state_dict(spliced).items()}
    got = {k: tuple(v.shape) for k, v in src.model.state_dict().items()}
    if want != got:
        differ = sorted(set(want) ^ set(got)) or sorted(k for k in want if want[k] != got.get(k))
        raise SpliceError(f"source {src.spec!r} does not build this splice's base (tensors differ: "
                          f"{', '.join(differ[:4])}); pass the spec and kwargs the base module was made with")
    new = info.replace(spec=src.spec, kwargs=dict(src.kwargs), code_sha256=src.code_sha256)
    state = {k: v.detach().clone() for k, v in spliced.state_dict().items()}
    try:
        # the record's points are re-applied to a copy (assemble's copy_base covers a record without any)
        again = assemble(src.model, new, state, f"source {src.spec!r}", copy_base=True)
    except Exception as exc:  # noqa: BLE001 - whatever stops the rebuild means the spec does not rebuild it
        raise SpliceError(f"source {src.spec!r} does not rebuild this splice ({first_line(exc)}); pass the spec "
                          "and kwargs the base module was made with") from exc
    result = quick_check(spliced, again, info.input_shapes, tol=None)
    if not result["passed"]:
        raise SpliceError(f"source {src.spec!r} builds a network with this splice's tensors but other outputs "
                          f"({result['detail']}); pass the spec and kwargs the base module was made with")
    return new


def cannot_rebuild(where: Any) -> ManifestError:
    """The error for a record whose base is :data:`MODULE_SPEC`."""
    return ManifestError(
        f"'{where}' records its base as a module object given in memory, which no folder can rebuild; load its "
        "weights into a splice of that module (spliced.load_state_dict(safetensors.torch.load_file(WEIGHTS))), "
        "or save it again with the spec that builds its base (splice.save(model, folder, source='pkg.module:"
        "factory'))"
    )


def source_of_spliced(model: nn.Module, input_shape=None) -> Source | None:
    """A Source for a spliced model in memory, from the record it carries (``None`` for a plain model)."""
    info = info_of(model)
    if info is None:
        return None
    shapes = parse_input_shapes(input_shape) or ()
    return Source(model=model, spec=info.spec, kwargs=dict(info.kwargs),
                  input_shape=shapes[0] if shapes else info.input_shape,
                  weights_sha256=state_dict_sha256(base_state_dict(model)), normalisation=info.normalisation,
                  class_names=info.class_names, random_init=info.random_init, leaves=info.leaves,
                  extra_inputs=tuple(shapes[1:]) if shapes else info.extra_inputs)
