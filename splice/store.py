"""The spliced-folder format: ``weights.safetensors`` + ``splice.json`` (see :mod:`splice.manifest`).

A folder is rebuilt from splice's own classes only: the base architecture from
the recorded spec, the warps from recorded :class:`~splice.warps.WarpConfig`
dicts, the tensors from safetensors. Nothing is unpickled (unless the base
itself was a pickled module, which again needs ``trust_pickle``).

Every path that opens a folder (:func:`load`, :func:`load_base`,
:func:`load_folder_source`, :func:`open_source` and ``splice verify``) goes
through :func:`open_folder`: it reads the manifest, hashes the weights file
while it builds the architecture on the meta device (no memory, no random
init), and hands out the checked tensors, which the models then adopt.
"""

from __future__ import annotations

import datetime as _dt
import json
import os
from collections.abc import Mapping, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path

import torch
from torch import nn

from .caches import caches_kept
from .copies import rng_kept, tree_copy
from .folders import folder_kind
from .fileio import atomic_dir, file_sha256, read_json, state_dict_sha256, write_safetensors
from .errors import IntegrityError, ManifestError, SourceError, SpliceError, WeightsError
from .objects import MODULE_SPEC, cannot_rebuild, respecified, source_of_spliced
from .manifest import (MANIFEST_NAME, SCHEMA_VERSION, WEIGHTS_NAME, SpliceInfo, attach_info, info_of,
                       validate_manifest, warn_if_edited, weights_metadata)
from .version import library_versions
from .sources import (Source, adopt_state, build_model, check_finite, check_state_fits, check_spec,
                      initialisers_skipped, is_hf_folder, load_source, materialise_lazy_, parse_input_shapes,
                      parse_kwargs, read_safetensors, with_metadata)
from .graph import relink_lifted
from .surgery import WARP_PREFIX, apply_info

__all__ = ["SCHEMA_VERSION", "MANIFEST_NAME", "WEIGHTS_NAME", "OpenedFolder", "open_folder", "open_source", "save",
           "load", "load_base", "assemble", "read_manifest", "load_folder_source", "is_splice_folder", "base_part"]


def _versions() -> dict[str, str]:
    return {**library_versions("torchvision"), "torch": torch.__version__}


def is_splice_folder(path: str | os.PathLike) -> bool:
    return (Path(path) / MANIFEST_NAME).is_file()


def read_manifest(folder: str | os.PathLike) -> dict:
    """Read and validate ``folder/splice.json``."""
    folder = Path(folder)
    path = folder / MANIFEST_NAME
    if not folder.exists():
        raise ManifestError(f"folder '{folder}' does not exist; check the path")
    if not path.is_file():
        if folder_kind(folder) == "run folder":
            raise ManifestError(f"'{folder}' is the run folder of a 'splice tune' run; give one of the models it "
                                f"saved: '{folder / 'best'}' or '{folder / 'last'}'")
        raise ManifestError(
            f"'{folder}' is not a splice folder (no {MANIFEST_NAME}); give a folder written by 'splice insert', "
            "or the best/ or last/ folder of a 'splice tune' run"
        )
    data = read_json(path, ManifestError, "the file is damaged — re-create the folder")
    return validate_manifest(data, str(path))


def base_part(state: Mapping[str, torch.Tensor]) -> dict[str, torch.Tensor]:
    """``state`` without the warp tensors (``splice_warps.*``)."""
    return {k: v for k, v in state.items() if not k.startswith(WARP_PREFIX + ".")}


# ----------------------------------------------------------------------------- save


def _plain_info(source) -> SpliceInfo:
    src = load_source(source, warn_random=False) if isinstance(source, str) else source
    if src is None or getattr(src, "spec", MODULE_SPEC) == MODULE_SPEC:
        raise SpliceError(
            "save() needs to know how to rebuild the base architecture; pass "
            "source='torchvision:NAME' / 'pkg.mod:factory' or a Source loaded from such a spec"
        )
    return SpliceInfo.from_source(src)


def save(model: nn.Module, folder: str | os.PathLike, *, overwrite: bool = False, source=None,
         tuning: Mapping | None = None, class_names=None, normalisation=None, trained_on: str | None = None) -> Path:
    """Write ``model`` to ``folder`` as ``weights.safetensors`` + ``splice.json``, atomically.

    ``model`` is a spliced model from :func:`splice.insert` (it carries its own
    provenance) or a plain model together with ``source`` (a spec string or
    :class:`~splice.sources.Source`). The folder is built beside the target and
    renamed into place, so a failure leaves no partial output. ``tuning``,
    ``class_names``, ``normalisation`` and ``trained_on`` (the images the base
    was trained on) replace the record's values when given.

    >>> spliced = splice.insert("torchvision:resnet18", at="layer1")   # doctest: +SKIP
    >>> splice.save(spliced, "out/r18-affine")                          # doctest: +SKIP
    PosixPath('out/r18-affine')
    """
    info = info_of(model) or _plain_info(source)
    if info.spec == MODULE_SPEC and source is not None:
        info = respecified(info, model, source, assemble)
    changes = {"tuning": dict(tuning) if tuning is not None else None,
               "class_names": list(class_names) if class_names is not None else None,
               "normalisation": dict(normalisation) if normalisation is not None else None,
               "trained_on": trained_on}
    info = info.replace(**{k: v for k, v in changes.items() if v is not None})
    state = {k: v.detach().to("cpu").contiguous().clone() for k, v in model.state_dict().items()}
    weights = {"file": WEIGHTS_NAME, "sha256": "",
               "base_sha256": state_dict_sha256(state, prefix_exclude=WARP_PREFIX + ".")}
    created = _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat()
    manifest = info.to_manifest(weights=weights, versions=_versions(), created=created)
    validate_manifest(manifest, "the manifest being written")
    with atomic_dir(folder, overwrite=overwrite) as tmp:
        # what splice.json says the model computes and means, hashed beside the tensors: verify's integrity row sees
        # an edit of a warp's config, the normalisation or the class names (manifest.MODEL_FIELDS)
        write_safetensors(tmp / WEIGHTS_NAME, state, {"format": "pt", **weights_metadata(manifest)})
        manifest["weights"]["sha256"] = file_sha256(tmp / WEIGHTS_NAME)
        (tmp / MANIFEST_NAME).write_text(json.dumps(manifest, indent=2, sort_keys=True) + "\n", encoding="utf-8")
    return Path(folder)


# ----------------------------------------------------------------------------- building


def _origin(info: SpliceInfo) -> Path | None:
    """The file ``info``'s spec was read from (its folder's manifest), or ``None`` for a record made in memory."""
    return None if info.folder is None else Path(info.folder) / MANIFEST_NAME


def _check_base_spec(info: SpliceInfo, trust_code: bool) -> None:
    """The gate for a recorded base spec (:func:`splice.sources.check_spec`), and no folder inside a folder."""
    if info.spec == MODULE_SPEC:
        raise cannot_rebuild(info.folder or "the splice record")
    check_spec(info.spec, info.kwargs, origin=_origin(info), trust_code=trust_code)
    if ":" not in info.spec and Path(info.spec).is_dir():
        where = _origin(info) or "the splice record"
        raise ManifestError(
            f"source.spec in '{where}' names a folder ('{info.spec}'), not an architecture; a folder's base must "
            "be a model spec such as torchvision:NAME — re-create the folder with 'splice insert'"
        )


def _rebuild_base(info: SpliceInfo, *, trust_pickle: bool = False, trust_code: bool = False) -> nn.Module:
    _check_base_spec(info, trust_code)
    if ":" not in info.spec:  # a pickled whole module
        return load_source(info.spec, input_shape=info.input_shape, trust_pickle=trust_pickle,
                           origin=_origin(info), trust_code=trust_code).model
    model, _ = build_model(info.spec, info.kwargs, origin=_origin(info), trust_code=trust_code)
    return materialise_lazy_(model, info.input_shapes, info.spec)  # lazy modules shaped as the saved weights


_META = torch.device("meta")
_EDITED = ("the folder was edited by hand or written by an incompatible version, or the model's code changed since "
           "the splice")


def _empty_base(info: SpliceInfo, trust_code: bool = False) -> nn.Module | None:
    """The base architecture with its tensors on the meta device (no memory, no random init), or ``None``.

    Only builders (``torchvision:NAME``, ``module:factory``) can be built this
    way; a builder that computes with its tensors while it runs fails on the
    meta device and gets ``None`` (the caller then builds it normally).
    """
    if ":" not in info.spec:
        return None
    _check_base_spec(info, trust_code)  # refused specs are refused, not left to the slow path
    try:
        # what library code caches while the model is built on meta holds no data: cleared afterwards
        with caches_kept() as kept, _META, initialisers_skipped():
            model, _ = build_model(info.spec, info.kwargs, origin=_origin(info), trust_code=trust_code)
            kept["model"] = model
        return materialise_lazy_(model, info.input_shapes, info.spec)
    except Exception:  # any failure here only means "build it the slow way"
        return None


def _on_meta(model: nn.Module) -> bool:
    """Some parameter or buffer of ``model`` is on the meta device (one walk, stopping at the first)."""
    return any(t is not None and t.is_meta for m in model.modules()
               for t in (*m._parameters.values(), *m._buffers.values()))


def _fill(model: nn.Module, state: Mapping[str, torch.Tensor]) -> nn.Module | None:
    """``model`` (built on the meta device) with ``state`` as its tensors, or ``None`` if that does not cover it.

    The tensors are adopted, not copied (``load_state_dict(assign=True)``),
    in the dtype they were saved in; a key or shape that does not fit (which
    :func:`open_folder` refuses first) is left to the strict load of the slow path. ``None`` also when a
    tensor outside the state dict (a non-persistent buffer) would stay on the
    meta device.
    """
    own = model.state_dict(keep_vars=True)
    if set(own) != set(state) or any(tuple(own[k].shape) != tuple(state[k].shape) for k in own):
        return None
    adopt_state(model, state)
    return None if _on_meta(model) else model


def _base_from_state(info: SpliceInfo, base_state: Mapping[str, torch.Tensor], *,
                     trust_pickle: bool = False, empty: nn.Module | None = None, trust_code: bool = False) -> nn.Module:
    """The base network holding ``base_state``: built empty and filled when it can be, else built and loaded.

    ``empty`` may pass in an :func:`_empty_base` to fill (it is used up).
    """
    empty = empty if empty is not None else _empty_base(info, trust_code)
    model = _fill(empty, base_state) if empty is not None else None
    if model is None:
        model = _rebuild_base(info, trust_pickle=trust_pickle, trust_code=trust_code)
        check_state_fits(model.state_dict(), base_state, f"the weights of '{info.folder}'",
                         "the model's code changed since the splice: build it as it was, or splice it again")
        model.load_state_dict(with_metadata(model, base_state), strict=True)
    return model.eval()


def assemble(base: nn.Module, info: SpliceInfo, state: dict[str, torch.Tensor], folder: str | os.PathLike, *,
             copy_base: bool = False) -> nn.Module:
    """Re-apply a recorded splice to ``base`` and load ``state`` strictly.

    Splicing traces a private copy of ``base``; a record without points uses
    ``base`` itself unless ``copy_base``. Weights that do not fit are refused
    by name. A ``base`` on the meta device (built empty) adopts the tensors
    of ``state`` instead of copying them.
    """
    return _load_into(_frame(base, info, copy_base=copy_base), state, folder, assign=_on_meta(base))


def _frame(base: nn.Module, info: SpliceInfo, *, copy_base: bool = False) -> nn.Module:
    """The spliced architecture of ``info`` around a traced copy of ``base``, weights not loaded.

    Around an empty base the warps are built unfilled (no random draws: the state about to be adopted holds every
    parameter), with CPU buffers in the default dtype; :func:`_load_into` gives them the saved tensors' dtype."""
    if not info.points:
        return tree_copy(base) if copy_base else base
    return apply_info(base, info, unfilled=_on_meta(base))


def _load_into(model: nn.Module, state: Mapping[str, torch.Tensor], folder, *, assign: bool) -> nn.Module:
    """Load ``state`` into ``model`` strictly (adopting the tensors with ``assign``), naming what does not fit."""
    from .warps import Warp
    from .warps.grids import grid_dtype

    own = model.state_dict(keep_vars=True)
    check_state_fits(own, state, f"the weights of '{folder}'", _EDITED)
    if not assign:
        model.load_state_dict(with_metadata(model, state), strict=True)
    else:
        adopt_state(model, state)
        relink_lifted(model)  # constants the tracer lifted from buffer views, on the meta device until now
        for warp in (m for m in model.modules() if isinstance(m, Warp)):
            p = next(iter(warp.parameters()), None)
            # the frame built every buffer the state does not hold (grids, the head's pooling and identity) in
            # the default dtype on the CPU: all of them follow the adopted parameters (a half model's head too)
            if p is not None and any(b.is_floating_point() and b.dtype != (grid_dtype(p.dtype) if is_grid else p.dtype)
                                     or b.device != p.device for b, is_grid in _warp_buffers(warp)):
                warp.to(device=p.device, dtype=p.dtype)  # rebuilds its grid buffers in float64, then rounds once
        if _on_meta(model):
            raise WeightsError(f"'{folder}': the model keeps tensors outside its state dict; build its base for "
                               "real before assembling it")
    return model


def _warp_buffers(warp: nn.Module):
    """``(buffer, is it a grid buffer)`` for each buffer of ``warp``: its own are grids (kept at least float32,
    :func:`~splice.warps.grids.grid_dtype`), its submodules' run in the parameters' dtype."""
    own = set(map(id, warp.buffers(recurse=False)))
    return [(b, id(b) in own) for b in warp.buffers()]


def _assembled(info: SpliceInfo, state: dict[str, torch.Tensor], folder: Path, *, trust_pickle: bool,
               empty: nn.Module | None = None, frame: nn.Module | None = None, trust_code: bool = False) -> nn.Module:
    """The spliced model holding ``state``: assembled on an empty base when it can be, else on a built one.

    ``empty`` may pass in an :func:`_empty_base`; with points it is traced
    (copied), not changed, so it can still be filled afterwards. ``frame``
    may pass in ``_frame(empty, info)``, built while the weights were still
    being checked.
    """
    if frame is None:
        empty = empty if empty is not None else _empty_base(info, trust_code)
        if empty is not None:
            frame = _frame(empty, info, copy_base=True)
    if frame is not None:
        try:
            return _load_into(frame, state, folder, assign=True)
        except WeightsError:
            pass  # the paths below name what does not fit
        try:
            # traced on the meta device, the frame may hold other constants the tracer lifted: trace the
            # base filled with the folder's tensors instead, which needs no random init
            base = _base_from_state(info, base_part(state), trust_pickle=trust_pickle, trust_code=trust_code)
            return assemble(base, info, state, folder)
        except WeightsError:
            pass  # the strict, slow path below names what does not fit
    return assemble(_rebuild_base(info, trust_pickle=trust_pickle, trust_code=trust_code), info, state, folder)


# ----------------------------------------------------------------------------- opening a folder


@dataclass
class OpenedFolder:
    """A folder whose weights were hashed against ``splice.json``: its record, tensors, and models on demand.

    ``state`` is ``None`` when the file does not match its recorded hash
    (:attr:`intact` is false; only with ``strict=False``). :meth:`spliced`
    and :meth:`base` build the models (each adopts ``state``'s tensors);
    the architecture was already built empty while the file was hashed.
    """

    folder: Path
    manifest: dict
    info: SpliceInfo
    weights_path: Path
    recorded_sha256: str
    actual_sha256: str
    state: dict[str, torch.Tensor] | None
    trust_pickle: bool = False
    empty: nn.Module | None = field(default=None, repr=False)
    frame: nn.Module | None = field(default=None, repr=False)
    trust_code: bool = False

    @property
    def intact(self) -> bool:
        return self.recorded_sha256 == self.actual_sha256

    def _tensors(self) -> dict[str, torch.Tensor]:
        if self.state is None:
            raise IntegrityError(f"'{self.weights_path}' does not match the sha256 recorded in {MANIFEST_NAME}; "
                                 "its tensors cannot be used — restore the folder from a good copy")
        return self.state

    def spliced(self) -> nn.Module:
        """The spliced model (eval mode, carrying :attr:`info`)."""
        model = _assembled(self.info, self._tensors(), self.folder, trust_pickle=self.trust_pickle,
                           empty=self.empty, frame=self.frame, trust_code=self.trust_code)
        self.frame = None  # used up
        attach_info(model, self.info)
        return model.eval()

    def base(self) -> nn.Module:
        """The base network: the architecture with the base part of the weights (eval mode)."""
        model = _base_from_state(self.info, base_part(self._tensors()), trust_pickle=self.trust_pickle,
                                 empty=self.empty, trust_code=self.trust_code)
        self.empty = None  # used up
        return model


def _build_empty(info: SpliceInfo, frame: bool, trust_code: bool) -> tuple[nn.Module | None, nn.Module | None]:
    try:
        empty = _empty_base(info, trust_code)
        return empty, (_frame(empty, info, copy_base=True) if frame and empty is not None else None)
    except Exception:  # left to the slow path, which reports it after the integrity check
        return None, None


def open_folder(folder: str | os.PathLike, *, keep_mapped: bool = False, trust_pickle: bool = False,
                strict: bool = True, frame: bool = True, trust_code: bool = False) -> OpenedFolder:
    """Read a folder's manifest and check its weights against the recorded sha256.

    The file is hashed on a second thread while the architecture (and, with ``frame``, the spliced frame around it)
    is built on the meta device; no byte of it is loaded before its hash is known to match. With ``strict`` a
    mismatch raises :class:`~splice.errors.IntegrityError` and edited points warn, else the result has
    ``state=None`` (the caller reports both: verify's integrity row). safetensors maps the file; with
    ``keep_mapped`` the tensors stay backed by it (for a caller that lives only as long as one call: a file
    truncated while they are alive kills the process with SIGBUS), else they are copied out, so a loaded model
    never depends on it.

    The recorded spec came from a file: it passes the gate of :func:`splice.sources.check_spec` (a registry
    lookup, or ``trust_code``) before anything is built.
    """
    folder = Path(folder)
    manifest = read_manifest(folder)
    info = SpliceInfo.from_manifest(manifest, folder=folder)
    _check_base_spec(info, trust_code)
    path = folder / manifest["weights"]["file"]
    if not path.is_file():
        raise WeightsError(f"'{path}' is missing; the folder is incomplete — re-create it with 'splice insert'")
    recorded = manifest["weights"]["sha256"]
    with ThreadPoolExecutor(max_workers=1) as pool:
        # hashing releases the GIL (file_sha256 hashes the mapped file in one call)
        file_hash = pool.submit(file_sha256, path)
        empty, framed = _build_empty(info, frame, trust_code)
        actual = file_hash.result()
    opened = OpenedFolder(folder, manifest, info, path, recorded, actual, None, trust_pickle, empty, framed, trust_code)
    if actual != recorded:
        if strict:
            raise IntegrityError(
                f"'{path}' does not match the sha256 recorded in {MANIFEST_NAME} "
                f"(recorded {recorded[:12]}…, found {actual[:12]}…); the weights were "
                "changed or damaged after saving — restore the folder from a good copy"
            )
        return opened
    if strict:
        warn_if_edited(folder, path, manifest)
    state = read_safetensors(path)
    own = empty.state_dict(keep_vars=True) if empty is not None else {}
    if own and not any(nn.parameter.is_lazy(t) for t in own.values()):  # shapes known: refuse before a real build
        check_state_fits(own, base_part(state), f"the weights of '{folder}'", _EDITED)
    opened.state = state if keep_mapped else {k: v.clone() for k, v in state.items()}
    return opened


# ----------------------------------------------------------------------------- load


@rng_kept()
def load(folder: str | os.PathLike, *, trust_pickle: bool = False, trust_code: bool = False) -> nn.Module:
    """Rebuild a model saved by :func:`save`: base from its spec, warps re-applied, weights loaded.

    The weights file is refused if its sha256 differs from the one recorded at
    save time. The model is returned in eval mode. A recorded spec that no
    registry lists (``pkg.mod:factory``, ``file.py:factory``) is built only
    with ``trust_code=True`` (or ``SPLICE_TRUST_CODE=1``).

    >>> model = splice.load("out/r18-affine")   # doctest: +SKIP
    """
    opened = open_folder(folder, trust_pickle=trust_pickle, trust_code=trust_code)
    check_finite(opened.state, f"'{opened.weights_path}'")
    return opened.spliced()


@rng_kept()
def load_base(folder: str | os.PathLike, *, trust_pickle: bool = False, trust_code: bool = False) -> nn.Module:
    """The base network of a folder: its architecture with the base part of the saved weights."""
    return open_folder(folder, trust_pickle=trust_pickle, frame=False, trust_code=trust_code).base()


@rng_kept()
def load_folder_source(folder: str | os.PathLike, *, trust_pickle: bool = False, trust_code: bool = False) -> Source:
    """A :class:`~splice.sources.Source` for a spliced (or plain, from ``tune``) folder."""
    opened = open_folder(folder, trust_pickle=trust_pickle, trust_code=trust_code)
    check_finite(opened.state, f"'{opened.weights_path}'")
    model = opened.spliced()
    info, manifest = opened.info, opened.manifest
    return Source(
        model=model,
        spec=info.spec,
        kwargs=dict(info.kwargs),
        input_shape=info.input_shape,
        weights_path=os.path.abspath(opened.weights_path),
        weights_sha256=manifest["weights"].get("base_sha256"),
        normalisation=info.normalisation,
        class_names=info.class_names,
        manifest=manifest,
        random_init=info.random_init,
        leaves=info.leaves,
        extra_inputs=info.extra_inputs,
    )


def _folder_source(folder, weights, kwargs, input_shape, *, trust_pickle: bool, trust_code: bool) -> Source:
    """:func:`load_folder_source`, refusing the options a folder settles itself rather than ignoring them."""
    def ignored(given: str) -> SourceError:
        return SourceError(f"'{folder}' is a folder splice wrote: it carries its own weights and builder arguments, "
                           f"so {given} would be ignored; drop it, or splice the model spec with those weights")

    if weights is not None:  # before any work: a folder never takes other weights
        raise ignored("--weights (weights=)")
    src = load_folder_source(folder, trust_pickle=trust_pickle, trust_code=trust_code)
    # a resumed run passes back the folder's own builder arguments, which are not ignored but the same
    if kwargs and parse_kwargs(kwargs) != dict(src.kwargs):
        raise ignored("--kwargs (kwargs=)")
    shapes = parse_input_shapes(input_shape)
    if shapes and tuple(shapes[0]) != tuple(src.input_shape):
        recorded = "x".join(map(str, src.input_shape))
        raise SourceError(f"'{folder}' takes {recorded} images (its splice.json records them), not "
                          f"{'x'.join(map(str, shapes[0]))}; drop --input-shape")
    return src


def open_source(thing, *, weights: str | os.PathLike | None = None, kwargs: Mapping | str | None = None,
                input_shape: str | Sequence[int] | None = None, leaves: Sequence[str] = (),
                trust_pickle: bool = False, allow_partial: bool = False, warn_random: bool = True,
                origin: str | os.PathLike | None = None, trust_code: bool = False,
                default_input_shape=None) -> Source:
    """A :class:`~splice.sources.Source` for anything a command accepts: a folder written by
    :func:`save` (opened here), else whatever :func:`splice.sources.load_source` resolves.

    ``origin`` is the file ``thing`` and ``kwargs`` were read from (``None``:
    the user gave them); a folder's own manifest is always treated as a file.
    ``default_input_shape`` is the shape a model that declares none takes.

    >>> src = open_source("out/r18-affine")   # doctest: +SKIP
    """
    if isinstance(thing, (str, os.PathLike)) and Path(thing).is_dir() and not is_hf_folder(thing):
        return _folder_source(thing, weights, kwargs, input_shape, trust_pickle=trust_pickle, trust_code=trust_code)
    spliced = source_of_spliced(thing, input_shape) if isinstance(thing, nn.Module) else None
    if spliced is not None:
        return spliced
    spec = os.fspath(thing) if isinstance(thing, os.PathLike) else thing
    return load_source(spec, weights=weights, kwargs=kwargs, input_shape=input_shape, leaves=leaves,
                       trust_pickle=trust_pickle, allow_partial=allow_partial, warn_random=warn_random,
                       origin=origin, trust_code=trust_code, default_input_shape=default_input_shape)
