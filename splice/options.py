"""Options that travel together: how to build a model from its source, and the keyword path.

:class:`ModelOptions` holds the options of :func:`splice.store.open_source`
beyond the spec itself; ``tune`` and ``evaluate`` take one instead of six
loose parameters. :func:`split_keywords` spreads flat keyword arguments (what
the command line produces) over such dataclasses by field name, so each
command keeps a keyword path without a long signature.
"""

from __future__ import annotations

import dataclasses
import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from .errors import SpliceError

__all__ = ["ModelOptions", "split_keywords", "load_against"]


@dataclass(frozen=True)
class ModelOptions:
    """How to build a model from a spec: the options of :func:`splice.store.open_source`.

    ``weights`` is a checkpoint file for the architecture, ``kwargs`` the
    builder's keyword arguments (a mapping or a JSON string), ``input_shape``
    ``(C, H, W)`` (or a ``CxHxW`` string) when the builder does not declare one,
    ``leaves`` extra module types the tracer must not enter, ``trust_pickle``
    the explicit opt-in to unpickling, ``allow_partial`` accepts a checkpoint
    that covers only part of the model. ``trust_code`` is the explicit opt-in
    to building a model spec read from a file (a folder's manifest, a run's
    ``run.json``) that no registry lists; ``origin`` is that file when the
    spec itself was read from one (``None``: the user gave it). ``trust_code``
    also allows code shipped with a model (a Hugging Face config's ``auto_map``).
    """

    weights: str | os.PathLike | None = None
    kwargs: Mapping | str | None = None
    input_shape: Any = None
    leaves: tuple[str, ...] = ()
    trust_pickle: bool = False
    allow_partial: bool = False
    trust_code: bool = False
    origin: str | os.PathLike | None = None

    def __post_init__(self) -> None:
        if self.weights is not None and not isinstance(self.weights, (str, os.PathLike)):
            raise ValueError(f"ModelOptions.weights must be a path or None; got {self.weights!r}")
        if self.kwargs is not None and not isinstance(self.kwargs, (Mapping, str)):
            raise ValueError(f"ModelOptions.kwargs must be a mapping, a JSON string or None; got {self.kwargs!r}")
        leaves = self.leaves
        if isinstance(leaves, str) or not isinstance(leaves, Sequence) or not all(isinstance(x, str) for x in leaves):
            raise ValueError(f"ModelOptions.leaves must be a sequence of names; got {leaves!r}")
        object.__setattr__(self, "leaves", tuple(leaves))
        if self.origin is not None and not isinstance(self.origin, (str, os.PathLike)):
            raise ValueError(f"ModelOptions.origin must be a path or None; got {self.origin!r}")
        for name in ("trust_pickle", "allow_partial", "trust_code"):
            if not isinstance(getattr(self, name), bool):
                raise ValueError(f"ModelOptions.{name} must be True or False; got {getattr(self, name)!r}")

    def as_flags(self) -> str:
        """These options as the flags a next command takes (each quoted for a shell, each with a leading space);
        ``origin`` is not a flag."""
        import json
        import shlex

        flags = [] if self.weights is None else ["--weights", os.fspath(self.weights)]
        if self.kwargs:
            flags += ["--kwargs", self.kwargs if isinstance(self.kwargs, str) else json.dumps(dict(self.kwargs))]
        for shape in _shape_texts(self.input_shape):
            flags += ["--input-shape", shape]
        for leaf in self.leaves:
            flags += ["--leaf", leaf]
        flags += [f for f, on in (("--allow-partial", self.allow_partial), ("--trust-pickle", self.trust_pickle),
                                  ("--trust-code", self.trust_code)) if on]
        return "".join(f" {shlex.quote(f)}" for f in flags)

    def load(self, model: Any, **extra: Any):
        """:func:`splice.store.open_source` of ``model`` with these options (``extra`` passed on)."""
        from .store import open_source

        spec = os.fspath(model) if isinstance(model, os.PathLike) else model
        return open_source(spec, weights=self.weights, kwargs=self.kwargs, input_shape=self.input_shape,
                           allow_partial=self.allow_partial, trust_pickle=self.trust_pickle, leaves=self.leaves,
                           trust_code=self.trust_code, origin=self.origin, **extra)


def _shape_texts(shape: Any) -> list[str]:
    """``CxHxW`` texts of an input shape as :class:`ModelOptions` holds it: ``None``, a ``CxHxW`` string, one
    (C, H, W) or a sequence of those (after the first, any per-sample shape, an int for a vector)."""
    if shape is None:
        return []
    if isinstance(shape, str):
        return [shape]
    from .sources import format_shape

    items = list(shape)
    if items and all(isinstance(v, int) for v in items):
        return [format_shape(items)]
    return [s if isinstance(s, str) else format_shape((s,) if isinstance(s, int) else s) for s in items]


def split_keywords(keywords: Mapping[str, Any], kinds: Sequence[type], where: str) -> list:
    """One instance of each dataclass in ``kinds``, built from the ``keywords`` named like its fields.

    A keyword that no dataclass has raises ``TypeError`` naming ``where`` and the keywords it takes.
    """
    left = dict(keywords)
    out = []
    for kind in kinds:
        names = [f.name for f in dataclasses.fields(kind)]
        out.append(kind(**{k: left.pop(k) for k in names if k in left}))
    if left:
        allowed = sorted(f.name for kind in kinds for f in dataclasses.fields(kind))
        raise TypeError(f"{where}() got unexpected keyword argument(s) {', '.join(sorted(left))}; "
                        f"it takes {', '.join(allowed)}")
    return out


_OWN_CODE = {"tune": "train", "evaluate": "evaluate", "inspect": "inspect"}


def refuse_several_inputs(command: str, shapes: Sequence, what: str = "the model") -> None:
    """One line when ``command`` (which feeds one image per sample) meets a model with several inputs."""
    if len(shapes) <= 1:
        return
    from .sources import format_shape

    listed = ", ".join(format_shape(s) for s in shapes)
    raise SpliceError(f"{command} feeds one image per sample, but {what} takes {len(shapes)} inputs ({listed}); "
                      f"{command} a model that takes one image (e.g. a factory returning the submodule that sees the "
                      f"images, spliced on its own), or {_OWN_CODE.get(command, command)} this one in your own code")


def refuse_unfit_inputs(model, shapes: Sequence, what: str = "the model") -> None:
    """One line when ``model`` fails on a probe batch of two random images of ``shapes`` (an image too small for
    its pooling), found by one no-grad forward on a twin in eval mode, before any work: the same failure at the
    first batch was an internal error. Two images, not one: a model may squeeze the batch dimension away or
    normalise over the batch. The caller's model, buffers and modes are not changed."""
    import torch

    from .copies import private_buffers
    from .errors import first_line
    from .graph.shapes import input_dtype, model_device
    from .sources import format_shape

    if not shapes:
        return
    like = {"device": model_device(model), "dtype": input_dtype(model)}
    twin = private_buffers(model).eval()
    try:
        with torch.no_grad():
            draws = torch.Generator().manual_seed(0)  # its own generator: the caller's next draw is unmoved
            twin(*[torch.rand((2, *(int(v) for v in s)), generator=draws).to(**like) for s in shapes])
    except Exception as exc:  # whatever the first batch would have raised, said before any work
        listed = ", ".join(format_shape(s) for s in shapes)
        raise SpliceError(f"{what} fails on a probe batch of two {listed} images ({type(exc).__name__}: "
                          f"{first_line(exc)}); if the input shape is wrong, pass --input-shape CxHxW (the images "
                          "are resized to it)") from None


# the opt-ins a refusal of ``against`` names, as the user gives them for that model: the command line's flag, and
# in Python evaluate's against_options or evaluate_keywords' flat keyword
_AGAINST_OPT_INS = (
    ("--trust-code", "--against-trust-code"), ("--trust-pickle", "--against-trust-pickle"),
    ("trust_code=True", "against_options=ModelOptions(trust_code=True) to evaluate, against_trust_code=True to "
                        "evaluate_keywords"),
    ("trust_pickle=True", "against_options=ModelOptions(trust_pickle=True) to evaluate, against_trust_pickle=True to "
                          "evaluate_keywords"),
)


def load_against(against, options: ModelOptions, default_input_shape):
    """``options.load(against)`` for the second model of a comparison (``--against MODEL2``); a refusal names the
    opt-ins that model takes (``--against-trust-code``, ...), not the first model's."""
    try:
        return options.load(against, default_input_shape=default_input_shape)
    except SpliceError as exc:
        text = str(exc)
        for mine, theirs in _AGAINST_OPT_INS:
            text = text.replace(mine, theirs)
        if text == str(exc):
            raise
        try:
            again = type(exc)(f"--against: {text}")
        except TypeError:  # an error class that takes more than a message
            again = SpliceError(f"--against: {text}")
        raise again from exc
