"""Model sources: one spec string names an architecture, its weights come separately.

Spec forms, used by every command:

- ``torchvision:NAME`` — a torchvision architecture, built with ``weights=None``
  (nothing is downloaded). Builder arguments come from ``kwargs``.
- ``package.module:factory`` — a callable importable from an installed package.
- ``path/to/file.py:factory`` — a callable defined in a Python file.
- ``path/to/model.pt`` — a whole pickled ``nn.Module``; loads only with
  ``trust_pickle=True`` because unpickling can run arbitrary code.
- ``timm:NAME`` — a timm architecture by name (``pretrained=False``; timm is optional).
- ``transformers:ClassName`` with ``kwargs={"config": {...}}`` — a Hugging Face
  model class of the installed transformers, built from its config.
- ``path/to/hf_folder`` — a folder written by ``save_pretrained`` (``config.json``
  and weights), built from its config; custom code (``auto_map``) only with
  ``trust_code=True``.
- ``path/to/folder`` — a folder written by :func:`splice.save` (opened by
  :func:`splice.store.open_source`).

A spec read from a file (a folder's manifest, a run's ``run.json``) is built
only through a registry lookup unless the user opts in with ``trust_code``
(:mod:`splice.sources.trust`).

Weights (``.pt``/``.pth``/``.bin`` state dicts through
``torch.load(weights_only=True)``, or ``.safetensors``) may be wrapped in
``{"state_dict": ...}`` / ``{"model": ...}`` and carry ``module.`` /
``model.`` / ``_orig_mod.`` prefixes; both are detected and stripped. Missing,
unexpected and shape-mismatched names are refused unless ``allow_partial``.
"""

from __future__ import annotations

from .adopting import adopt_state
from .builders import IMAGENET_NORMALISATION, build_model, code_change, code_sha256, spec_file
from .empty import initialisers_skipped
from .huggingface import is_hf_folder, read_hf_folder
from .lazy import materialise_lazy_
from .source import MODULE_SPEC, Source, load_source, uncompiled
from .specs import format_shape, parse_input_shape, parse_input_shapes, parse_kwargs
from .trust import REGISTRY_KINDS, TRUST_ENV, RegistryKind, check_spec, code_trusted, register_kind, registry_kind_of
from .weights import (
    NESTING_KEYS,
    WRAPPER_PREFIXES,
    check_dtypes,
    check_state_fits,
    check_finite,
    load_weights_,
    read_safetensors,
    read_weights,
    strip_prefixes,
    with_metadata,
)

__all__ = [
    "Source",
    "adopt_state",
    "MODULE_SPEC",
    "load_source",
    "uncompiled",
    "build_model",
    "code_sha256",
    "code_change",
    "spec_file",
    "initialisers_skipped",
    "materialise_lazy_",
    "is_hf_folder",
    "read_hf_folder",
    "read_weights",
    "strip_prefixes",
    "read_safetensors",
    "with_metadata",
    "load_weights_",
    "parse_input_shape",
    "parse_input_shapes",
    "parse_kwargs",
    "format_shape",
    "check_finite",
    "check_dtypes",
    "check_state_fits",
    "IMAGENET_NORMALISATION",
    "check_spec",
    "code_trusted",
    "registry_kind_of",
    "register_kind",
    "RegistryKind",
    "REGISTRY_KINDS",
    "TRUST_ENV",
    "WRAPPER_PREFIXES",
    "NESTING_KEYS",
]
