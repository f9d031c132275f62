"""The gate: a spec read from a file is rebuilt only through a registry lookup, unless the user opts in.

A spec the user typed (a command-line argument, an API argument) is the
user's own choice and runs as it always did. A spec read from a file — a
folder's ``splice.json`` (``source.spec``/``source.kwargs``), a run folder's
``run.json`` (``model``/``model_kwargs``), anything else on disk — names code
that whoever wrote the file chose. Such a spec is built only when a registry
of an installed library lists it (:data:`REGISTRY_KINDS`):

- ``torchvision:NAME`` for a name ``torchvision.models.list_models()`` gives;
- ``splice.models:NAME`` for a name :mod:`splice.models` exports;
- ``timm:NAME`` for a name timm's registry holds (timm installed);
- ``transformers:Class`` for a model class the installed transformers
  exports, with a config that ships no code (no ``auto_map``);
- ``package.module:factory`` when an installed distribution registers exactly
  that factory under the ``splice.models`` entry-point group (read from the
  package metadata; nothing is imported to look it up).

Anything else from a file (``package.module:factory``, ``path.py:factory``, a
pickled module, a folder) is refused with :class:`~splice.errors.UntrustedCodeError`,
one line naming the spec, the file and the opt-in, unless the caller passes
``trust_code=True`` (``--trust-code``) or the environment holds
``SPLICE_TRUST_CODE=1``. The opt-in is read on every call and never stored.

Adding a library source is one :class:`RegistryKind` appended to
:data:`REGISTRY_KINDS` (or passed to :func:`register_kind`): a form for the
messages and a lookup that answers, without running code from the spec,
whether the library lists it.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Mapping
from dataclasses import dataclass

from ..errors import UntrustedCodeError
from .huggingface import transformers_lists
from .timm import timm_lists

__all__ = [
    "TRUST_ENV",
    "ENTRY_POINT_GROUP",
    "RegistryKind",
    "REGISTRY_KINDS",
    "register_kind",
    "registry_kind_of",
    "code_trusted",
    "check_spec",
]

TRUST_ENV = "SPLICE_TRUST_CODE"
ENTRY_POINT_GROUP = "splice.models"
_TRUE = {"1", "true", "yes", "on"}


@dataclass(frozen=True)
class RegistryKind:
    """One kind of spec that is built by a registry lookup, so a file may name it.

    ``form`` is how the kind is written, for messages (``"torchvision:NAME"``).
    ``lists(head, name, kwargs)`` gets a spec split at its last ``:`` and its
    builder kwargs, and returns True when the registry lists it. It must not
    import or call anything the spec names; an error inside it counts as
    "not listed".
    """

    form: str
    lists: Callable[[str, str, Mapping], bool]


def _torchvision_lists(head: str, name: str, kwargs: Mapping) -> bool:  # noqa: ARG001
    if head != "torchvision":
        return False
    import torchvision.models as tvm

    return name in tvm.list_models()


def _splice_models_lists(head: str, name: str, kwargs: Mapping) -> bool:  # noqa: ARG001
    if head != "splice.models":
        return False
    from .. import models

    return name in models.__all__ and callable(getattr(models, name, None))


def _entry_point_lists(head: str, name: str, kwargs: Mapping) -> bool:  # noqa: ARG001
    from importlib.metadata import entry_points

    wanted = f"{head}:{name}"
    return any(f"{ep.module}:{ep.attr}" == wanted for ep in entry_points(group=ENTRY_POINT_GROUP))


# The extension point: a library source appends a RegistryKind here (or calls register_kind).
REGISTRY_KINDS: list[RegistryKind] = [
    RegistryKind("torchvision:NAME", _torchvision_lists),
    RegistryKind("splice.models:NAME", _splice_models_lists),
    RegistryKind("timm:NAME", timm_lists),
    RegistryKind("transformers:Class (config asking for no code)", transformers_lists),
    RegistryKind(f"a '{ENTRY_POINT_GROUP}' entry point", _entry_point_lists),
]


def register_kind(kind: RegistryKind) -> None:
    """Add ``kind`` to :data:`REGISTRY_KINDS` (once; registering it again changes nothing)."""
    if not isinstance(kind, RegistryKind):
        raise TypeError(f"register_kind needs a RegistryKind, got {type(kind).__name__}")
    if kind not in REGISTRY_KINDS:
        REGISTRY_KINDS.append(kind)


def registry_kind_of(spec: str, kwargs: Mapping | None = None) -> RegistryKind | None:
    """The kind of registry that lists ``spec``, or ``None`` when no registry does (a plain import, a file)."""
    head, sep, name = spec.rpartition(":")
    if not sep or not head or not name:
        return None
    for kind in REGISTRY_KINDS:
        try:
            if kind.lists(head, name, dict(kwargs or {})):
                return kind
        except Exception:  # noqa: BLE001 - a lookup that fails does not list the spec
            continue
    return None


def code_trusted(trust_code: bool = False) -> bool:
    """True when the caller opted in: ``trust_code`` or ``SPLICE_TRUST_CODE=1`` in the environment (read now)."""
    return bool(trust_code) or os.environ.get(TRUST_ENV, "").strip().lower() in _TRUE


def check_spec(spec: str, kwargs: Mapping | None = None, *, origin: str | os.PathLike | None = None,
               trust_code: bool = False) -> None:
    """Refuse to build ``spec`` when it was read from the file ``origin`` and no registry lists it.

    ``origin`` is ``None`` for a spec the user typed (always allowed), else
    the file the spec came from (``FOLDER/splice.json``, ``RUN/run.json``).
    Raises :class:`~splice.errors.UntrustedCodeError` unless a registry lists
    the spec or the caller opted in (:func:`code_trusted`).
    """
    if origin is None or code_trusted(trust_code) or registry_kind_of(spec, kwargs) is not None:
        return
    forms = ", ".join(kind.form for kind in REGISTRY_KINDS)
    raise UntrustedCodeError(
        f"refused to build model spec {spec!r} read from '{os.fspath(origin)}': no registry lists it ({forms}), "
        f"so building it would run code that file names; if you trust the file, pass --trust-code "
        f"(trust_code=True, or {TRUST_ENV}=1)"
    )
