"""The ``provenance`` row: are the base weights bitwise the source checkpoint's?"""

from __future__ import annotations

import warnings
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import torch

from ..fileio import state_dict_sha256
from ..copies import bitwise_equal
from ..errors import SpliceError, SpliceWarning
from ..manifest import MANIFEST_NAME, SpliceInfo
from ..recipes import MODES
from ..sources import code_change, code_sha256, load_source, read_weights, strip_prefixes
from .report import CheckResult

__all__: list[str] = []


def _source_state(info: SpliceInfo, input_shape, trust_code: bool = False,
                  trust_pickle: bool = False) -> tuple[dict | None, str, tuple]:
    """The source checkpoint's state dict as a load builds it, how it was found (or why it is unavailable), and the
    tensors that load left out (a partial load)."""
    path = info.source_weights_path
    if path is None:
        why = "the source was a random init" if info.random_init else "no source weights file was recorded"
        return None, f"{why}, so only hashes are compared", ()
    if not Path(path).is_file():
        gone = "is not a file" if Path(path).exists() else "is no longer on disk"
        return None, f"the source weights file '{path}' {gone}, so only hashes are compared", ()
    try:
        # a record read from a folder names its spec from a file: the same gate as opening the folder
        origin = None if info.folder is None else Path(info.folder) / MANIFEST_NAME
        with warnings.catch_warnings():  # a partial load was told when the folder was made
            warnings.simplefilter("ignore", SpliceWarning)
            src = load_source(info.spec, weights=path, kwargs=info.kwargs, input_shape=input_shape,
                              warn_random=False, leaves=info.leaves, origin=origin, trust_code=trust_code,
                              allow_partial=bool(info.source_not_loaded), trust_pickle=trust_pickle)
    except SpliceError as exc:
        return None, f"the source '{path}' could not be rebuilt ({exc}), so only hashes are compared", ()
    return dict(src.model.state_dict()), f"compared with '{path}'", tuple(src.not_loaded)


def _claimed_but_given(info: SpliceInfo, given: set[str]) -> dict | None:
    """The differences to report when splice.json says tensors were not loaded that the source does give (the
    record was edited: a claim of a partial load excuses nothing the file can vouch for), else ``None``."""
    false = sorted(set(info.source_not_loaded) & given)
    if not false:
        return None
    return {"tensors": len(info.source_not_loaded), "changed": len(false), "max_abs_diff": float("inf"),
            "largest": [], "names": false, "missing": [], "unexpected": [], "falsely_not_loaded": false}


def _against_file(info: SpliceInfo, base_state: Mapping[str, torch.Tensor], input_shape, trust_code: bool,
                  reference=None, trust_pickle: bool = False) -> tuple[bool | None, str, dict | None, dict | None]:
    """Whether the base is bitwise the recorded source file's weights, read now (``None``: cannot tell), how it was
    found, the differences, and the source's state dict as a load gives it (``None`` when that cannot be told
    exactly: the recorded source hash is compared with it). The file is read as it is first (cheap); only when its
    tensors do not line up with the base's is the source model rebuilt from it, as a load would (a nested or
    renamed state). Tensors splice.json says a partial load left out are excused only if the file lacks them."""
    path = info.source_weights_path
    claimed = set(info.source_not_loaded)
    if path is not None and Path(path).is_file():
        try:
            with warnings.catch_warnings():  # what a load strips was told when the folder was made
                warnings.simplefilter("ignore", SpliceWarning)
                read = strip_prefixes(read_weights(path, trust_pickle=trust_pickle), set(base_state))
        except (SpliceError, OSError, RuntimeError, ValueError):  # a pickle without trust, a folder: rebuild below
            read = None
        if read is not None:
            fits = {k for k in base_state if k in read and read[k].shape == base_state[k].shape}
            false = _claimed_but_given(info, fits)
            if false is not None:
                return False, f"read from '{path}'", false, None
            # a batch counter the file lacks is the model's own (older checkpoints have none); one it holds counts
            names = [k for k in base_state if k not in claimed
                     and (k in read or k.rsplit(".", 1)[-1] != "num_batches_tracked")]
            if all(k in fits for k in names):
                aligned = {k: read[k].to(base_state[k].dtype) for k in names}
                diff = _tensor_diff({k: base_state[k] for k in names}, aligned)
                # the file's whole state as a load gives it, when it holds every tensor (batch counters included):
                # then ``names`` is every tensor, and ``aligned`` that state
                whole = None if claimed or set(base_state) - fits else aligned
                return diff["changed"] == 0, f"read from '{path}'", diff, whole
    state, how, left = _source_state(info, input_shape, trust_code, trust_pickle)
    if state is not None:
        false = _claimed_but_given(info, set(state) - set(left))
        if false is not None:
            return False, how, false, None
    if state is None and reference is not None:
        # the module a splice of a module object was made from, while it still hashes to the recorded source
        ref = dict(reference.state_dict())
        if state_dict_sha256(ref) == info.source_weights_sha256:
            state, how = ref, "compared with the module it was spliced from"
    if state is None:
        return None, how, None, None
    base_state = {k: v for k, v in base_state.items() if k not in claimed}
    diff = _tensor_diff(base_state, {k: v for k, v in state.items() if k not in claimed})
    return diff["changed"] == 0 and not diff["missing"], how, diff, None if claimed else state


def _tensor_diff(base: Mapping[str, torch.Tensor], source: Mapping[str, torch.Tensor]) -> dict:
    changed: list[tuple[str, float, bool]] = []  # name, max abs diff, an integer tensor (a batch counter)
    missing = sorted(set(source) - set(base))
    extra = sorted(set(base) - set(source))
    for name in sorted(set(base) & set(source)):
        a, b = base[name], source[name]
        if bitwise_equal(a, b):
            continue
        if a.shape != b.shape:
            changed.append((name, float("inf"), not a.is_floating_point()))
        elif a.is_floating_point() or b.is_floating_point():
            changed.append((name, float((a.detach().double() - b.detach().double()).abs().max()),
                            not a.is_floating_point()))
        else:
            changed.append((name, float((a.long() - b.long()).abs().max()), True))
    # values first, by size; integer tensors (batch counters) after them: a counter's +34 says nothing of how far
    # the weights moved
    changed.sort(key=lambda t: (t[2], -t[1]))
    return {"tensors": len(source), "changed": len(changed), "max_abs_diff": changed[0][1] if changed else 0.0,
            "largest": [{"name": n, "max_abs_diff": d} for n, d, _ in changed[:5]],
            "names": [n for n, _, _ in changed],
            "missing": missing, "unexpected": extra}

def _told(diff: dict) -> str:
    """``"N of M tensors differ, max abs diff X (the largest)"``."""
    largest = ", ".join(f"{d['name']} {d['max_abs_diff']:.3g}" for d in diff["largest"][:3])
    return (f"{diff['changed']} of {diff['tensors']} tensors differ, max abs diff {diff['max_abs_diff']:.3g}"
            + (f" ({largest})" if largest else ""))


def _partial(info: SpliceInfo) -> str:
    """``"; N tensors (names) are not from it: ..."`` for a partial load, else ``""``."""
    left = info.source_not_loaded
    if not left:
        return ""
    shown = ", ".join(left[:4]) + (f" and {len(left) - 4} more" if len(left) > 4 else "")
    return (f"; {len(left)} tensor{'s are' if len(left) > 1 else ' is'} not from it ({shown}): a partial load "
            "(--allow-partial) left them at the builder's initialisation, and no file can vouch for them")


def _false_claim(numbers: dict, diff: dict, how: str) -> CheckResult:
    """The failed row for a record that says tensors were not loaded which the source gives."""
    numbers["diff"] = diff
    names = ", ".join(diff["falsely_not_loaded"][:4]) + (" …" if len(diff["falsely_not_loaded"]) > 4 else "")
    return CheckResult("provenance", False, numbers,
                       f"splice.json says {names} did not come from the source checkpoint (a partial load), but the "
                       f"source gives {'it' if len(diff['falsely_not_loaded']) == 1 else 'them'} in the model's "
                       f"shape ({how}): the record was edited, or the checkpoint changed since the splice — "
                       "re-create the folder from the source with 'splice insert'", "record edited")


def _code_changed(info: SpliceInfo) -> CheckResult | None:
    """A failed row when the model file the base is built from is not the one that was spliced, else ``None``:
    the base and the splice would both be rebuilt from the new code, and equal each other, yet not the model
    that was spliced."""
    told = code_change(info.spec, info.code_sha256)
    if told is None:
        return None
    return CheckResult("provenance", False, {"code_sha256": code_sha256(info.spec),
                                             "recorded_code_sha256": info.code_sha256}, told, "model file changed")


_TRAINS_PARAMETERS = ("baseline", "joint", "staged")  # the recipes' modes that may move a base's parameters
_MAX_CHAIN = 100


def _tunings(tuning) -> list[Mapping]:
    """The tunings a folder went through, latest first (each record keeps the one before it as ``before``)."""
    chain: list[Mapping] = []
    while isinstance(tuning, Mapping) and len(chain) < _MAX_CHAIN:
        chain.append(tuning)
        tuning = tuning.get("before")
    return chain


def provenance_row(info: SpliceInfo, base_state: Mapping[str, torch.Tensor], actual: str, recorded_base: str | None,
                   input_shape, trust_code: bool = False, buffers: frozenset = frozenset(),
                   reference=None, trust_pickle: bool = False, self_updated: frozenset = frozenset()) -> CheckResult:
    """``actual`` is ``state_dict_sha256(base_state)``, computed once by the caller; ``buffers`` names the base's
    buffers (a difference in buffers alone is told as what running the model does to them); ``reference`` is the
    module an in-memory splice of a module object was made from, compared with when no source file is on disk
    (and only while it hashes to the recorded source)."""
    changed = _code_changed(info)
    if changed is not None:
        return changed
    source = info.source_weights_sha256
    chain = _tunings(info.tuning)
    # the latest record says whether the base differs from its source (each run measures it against the source)
    declared = bool(chain) and chain[0].get("base_changed") is True
    numbers: dict[str, Any] = {"base_sha256": actual, "source_sha256": source, "base_changed_recorded": declared}
    if recorded_base is not None:
        numbers["recorded_base_sha256"] = recorded_base
    if source is None:
        return CheckResult("provenance", False, numbers,
                           "splice.json records no source-weights hash, so the base cannot be traced to its source; "
                           "re-create the folder with 'splice insert'", "no source hash")
    found = _against_file(info, base_state, input_shape, trust_code, reference, trust_pickle)
    if found[2] is not None and found[2].get("falsely_not_loaded"):
        return _false_claim(numbers, found[2], found[1])
    if source == actual and (recorded_base is None or recorded_base == actual):
        return _as_recorded(info, numbers, found, actual, declared)
    return _moved(info, numbers, found, (actual, recorded_base), chain, buffers, self_updated)


def _what(info: SpliceInfo) -> str:
    return "the source checkpoint" if info.source_weights_path is not None else "the source"


def _as_recorded(info: SpliceInfo, numbers: dict, found: tuple, actual: str, declared: bool) -> CheckResult:
    """The row when the base hashes to the recorded source hash: the source file itself, when it is on disk, says
    whether the base is still its weights (the hashes are splice.json's, written with the folder)."""
    same, how, diff, whole = found
    if same is False:
        numbers["diff"] = diff
        if whole is not None and state_dict_sha256(whole) != info.source_weights_sha256:
            cause = ("either the checkpoint changed since the splice (its tensors no longer hash to the recorded "
                     "source hash: splice the new one, or keep the one the folder was made from), or the folder was "
                     "edited after splicing and its hashes rewritten (re-create it from the source with "
                     "'splice insert')")
        else:
            cause = "the folder was edited after splicing — re-create it from the source with 'splice insert'"
        return CheckResult("provenance", False, numbers,
                           f"the base weights differ from {_what(info)} ({how}: {_told(diff)}), although "
                           f"splice.json's hashes agree: {cause}", "base differs from source")
    note = " (tuning records base_changed, but the base weights did not move)" if declared else ""
    left = _partial(info)
    if same is None:  # nothing but the recorded hashes could be compared
        why = ("the source was a random init: nothing outside splice.json vouches for the base"
               if info.random_init else "only splice.json's hashes compared")
        return CheckResult("provenance", True, numbers,
                           f"base weights hash to the recorded source hash (sha256 {actual[:12]}…), but {how}{note}"
                           f"{left}", f"sha256 {actual[:12]}… = recorded",
                           warning=why + (", partial load" if left else ""))
    return CheckResult("provenance", True, numbers,
                       f"base weights are bitwise equal to {_what(info)} (sha256 {actual[:12]}…; {how}){note}{left}",
                       f"sha256 {actual[:12]}… = source" + (" (partial load)" if left else ""),
                       warning="partial load" if left else "")


def _moved(info: SpliceInfo, numbers: dict, found: tuple, hashes: tuple, chain: list[Mapping], buffers: frozenset,
           self_updated: frozenset) -> CheckResult:
    """The row when the base no longer hashes as recorded (``hashes``: its own and the recorded base's): tuned (as
    recorded), or changed since."""
    _, how, diff, state = found
    actual, recorded_base = hashes
    source = info.source_weights_sha256
    # the file as it is now no longer hashes to the recorded source (hashed once: it may be large)
    file_changed = state is not None and source != actual and state_dict_sha256(state) != source
    if diff is not None:
        numbers["diff"] = diff
        if file_changed:
            how += " (that file no longer hashes to the recorded source hash: it changed since the splice)"
        how += f": {_told(diff)}"
    differs = (f"base weights (sha256 {actual[:12]}…) differ from {_what(info)} (sha256 {source[:12]}…)"
               if source != actual else
               f"the base weights' sha256 {actual[:12]}… differs from the one recorded at save time "
               f"({recorded_base[:12]}…), and splice.json's source hash was rewritten to match it")
    moved = numbers.get("diff", {}).get("names") or []
    only_buffers = bool(moved) and not numbers["diff"]["missing"] and set(moved) <= buffers
    if numbers["base_changed_recorded"] and source != actual:
        if file_changed:
            return CheckResult("provenance", False, numbers,
                               f"{differs}; {how}: the checkpoint changed since the splice, so the differences are "
                               "against a file the folder was not made from (or the folder was edited and its "
                               "hashes rewritten) — verify against the checkpoint it was spliced from",
                               "source changed")
        return _tuned(info, numbers, chain, differs, how, moved if only_buffers else None, self_updated)
    again = "splice the source again ('splice insert', splice.insert)" + (
        " and verify before running it" if only_buffers else "")
    if only_buffers:
        return CheckResult("provenance", False, numbers,
                           f"{differs}, and no tuning of the base is recorded; {how}. Only buffers differ: a forward "
                           "that updates them (a counter, running statistics) changes them whenever the model runs, "
                           f"so a model that ran since it was spliced is no longer its source; {again}",
                           "base buffers changed")
    return CheckResult("provenance", False, numbers,
                       f"{differs}, and no tuning of the base is recorded; {how}. The weights were edited after "
                       f"splicing — {again}", "base changed")


def _named(modes: list) -> str:
    """``'warp-only' after 'joint'``, repeats collapsed (``'warp-only' ×3 after 'joint'``)."""
    parts: list[list] = []
    for m in modes:
        if parts and parts[-1][0] == m:
            parts[-1][1] += 1
        else:
            parts.append([m, 1])
    return " after ".join((repr(m) if m in MODES else f"a mode splice does not know ({m!r})")
                          + (f" ×{n}" if n > 1 else "") for m, n in parts)


def _tuned(info: SpliceInfo, numbers: dict, chain: list[Mapping], differs: str, how: str,
           moved_buffers: list | None, self_updated: frozenset) -> CheckResult:
    """A base whose tuning is recorded: passed when the recorded recipes could move what moved (``moved_buffers``:
    the names, when only buffers moved; ``self_updated``: the buffers the base's own eval-mode forward updates)."""
    modes = [t.get("mode") or t.get("recipe") for t in chain]
    cut = len(chain) >= _MAX_CHAIN
    told = _named(modes) + (" (the record's chain was cut)" if cut else "")
    known = all(m in MODES for m in modes) and not cut
    trains = any(m in _TRAINS_PARAMETERS for m in modes)
    left = _partial(info)
    warn = "partial load" if left else ""
    if moved_buffers is not None:
        if "batchnorm-stats" in modes and not trains:
            why = "'batchnorm-stats' re-estimated them on site images"
        elif set(moved_buffers) <= self_updated:
            why = "its forward updates them as it runs"
        elif trains or not known:
            why = f"{told} tuned it"
        else:
            return _contradicted(numbers, differs, how, told, "moves no buffer but those a forward updates")
        return CheckResult("provenance", True, numbers,
                           f"only the base's buffers moved ({why}; {told}, recorded in splice.json): {differs}; "
                           f"{how}{left}", "base buffers moved (recorded)", warning=warn)
    if known and not trains:
        return _contradicted(numbers, differs, how, told, "never moves a base's parameters")
    unnamed = "" if known else "the tuning record names a recipe splice does not know"
    return CheckResult("provenance", True, numbers,
                       f"the base was tuned as well ({told}, recorded in splice.json; nothing outside it vouches for "
                       f"the tuning, so keep the run folder it names): {differs}; {how}{left}",
                       "base tuned (recorded)", warning=", ".join(w for w in (unnamed, warn) if w))


def _contradicted(numbers: dict, differs: str, how: str, told: str, rule: str) -> CheckResult:
    return CheckResult("provenance", False, numbers,
                       f"{differs}; {how}. splice.json records tuning by {told}, which {rule}: the record does not "
                       "account for what moved — re-create the folder from the source with 'splice insert' and "
                       "tune it again", "tuning record contradicted")
