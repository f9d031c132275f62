"""Exceptions that splice raises for problems the user can fix.

Every user-facing failure is a :class:`SpliceError` (or a subclass). The CLI
turns one into a single line on stderr and exit code 2; ``--debug`` shows the
traceback. Messages follow one pattern: *what is wrong, what was given, what to
do*.
"""

from __future__ import annotations

import contextlib
import contextvars
import difflib
import os
import re
from collections.abc import Iterable

__all__ = [
    "SpliceError",
    "SourceError",
    "WeightsError",
    "UnsafeCheckpointError",
    "UntrustedCodeError",
    "GraphError",
    "PointError",
    "ManifestError",
    "IntegrityError",
    "RecipeError",
    "DataError",
    "CheckFailed",
    "NormalisationWarning",
    "DataWarning",
    "UprightChangeWarning",
    "ResourceError",
    "WriteError",
    "TrainingDiverged",
    "SpliceWarning",
    "RandomWeightsWarning",
    "EditedManifestWarning",
    "SiteMovedWarning",
    "suggest",
    "closest",
    "first_line",
]

# ``--debug``: what torch logs and prints around its exporters reaches the terminal (see :func:`debugging`)
_DEBUG = contextvars.ContextVar("splice_debug", default=False)


@contextlib.contextmanager
def debugging(on: bool = True):
    """For the duration, torch's own logs and prints around an export are shown (the CLI's ``--debug``); by
    default splice keeps them off the terminal and reports a failure in its one line."""
    token = _DEBUG.set(bool(on))
    try:
        yield
    finally:
        _DEBUG.reset(token)


def debug_shown() -> bool:
    """Is :func:`debugging` on?"""
    return _DEBUG.get()



class SpliceError(Exception):
    """A problem with the user's input, files or environment (CLI exit code 2)."""


class SourceError(SpliceError):
    """The model spec cannot be resolved to an architecture."""


class UntrustedCodeError(SourceError):
    """A model spec read from a file would run code no registry vouches for, and the user did not opt in."""


class WeightsError(SpliceError):
    """A weights file is missing, corrupt, or does not fit the architecture."""


class UnsafeCheckpointError(WeightsError):
    """A checkpoint needs unpickling arbitrary objects and the user did not opt in."""


class GraphError(SpliceError):
    """The model cannot be traced or analysed."""


class PointError(SpliceError):
    """An insertion point name is unknown, duplicated or unusable."""


class ManifestError(SpliceError):
    """A spliced folder's ``splice.json`` is missing or violates the schema."""


class IntegrityError(SpliceError):
    """A file's content no longer matches the hash recorded when it was written."""


class RecipeError(SpliceError):
    """A recipe has an unknown key or a bad value."""


class DataError(SpliceError):
    """A dataset name, folder or image cannot be used."""


class ResourceError(SpliceError):
    """The work asked for would not fit in this machine's memory; refused before allocating."""


class WriteError(SpliceError, OSError):
    """Writing the user's target failed. Also an ``OSError`` carrying the cause's errno and strerror, so code
    that handles OS errors still does; its message names the target, never a temporary file."""

    def __init__(self, message: str, cause: OSError | None = None, target: object = None) -> None:
        super().__init__(message)
        if cause is not None:
            self.errno, self.strerror = cause.errno, cause.strerror
        self.filename = None if target is None else str(target)

    def __str__(self) -> str:
        return str(self.args[0]) if self.args else ""


class CheckFailed(SpliceError):
    """An equivalence or parity check failed (``splice verify`` exits 1, not 2)."""

    label = "check failed"  # how the CLI introduces the one-line message


class TrainingDiverged(CheckFailed):
    """A loss or a weight became NaN or infinite during training (``splice tune`` exits 1).

    ``where`` says when: ``{"phase", "epoch", "step", "what"}``; the run folder
    keeps the last finite state.
    """

    label = "training diverged"

    def __init__(self, message: str, where: dict | None = None) -> None:
        super().__init__(message)
        self.where = dict(where or {})


class SpliceWarning(UserWarning):
    """Something the user should know about, but that does not stop the command."""


class RandomWeightsWarning(SpliceWarning):
    """The model was built without trained weights; its outputs mean nothing for accuracy."""


class UprightChangeWarning(SpliceWarning):
    """A warp run changes the base's predictions on many upright reference images."""


class DataWarning(SpliceWarning):
    """Data that is read, but not quite as it might look: a split without images of some class, a data set name
    that is also the name of a folder."""


class SiteMovedWarning(SpliceWarning):
    """A hooks warp may not reach the tensor it was spliced at: the forward calls its module a different number of
    times than when it was spliced (a loop whose count follows the input size), so the warp did not run or sits on
    another call; or the module hands back its own input, so a reference kept from before the call stays unwarped."""


class EditedManifestWarning(SpliceWarning):
    """A folder's splice.json points differ from those its weights were written with (``verify``'s integrity row
    fails it)."""


class NormalisationWarning(SpliceWarning):
    """Trained weights for a model that declares no normalisation: its images arrive as [0, 1] pixels."""


_TERMINAL_CODES = re.compile(r"\x1b\[[0-9;?]*[A-Za-z]")  # colours a library wrote for its own terminal
_SENTENCE_END = re.compile(r"[.!?](?=\s+[A-Z])")  # a full stop before a new sentence, not after "e.g."


def first_line(exc: BaseException, limit: int = 300) -> str:
    """The first non-empty line of ``str(exc)`` without terminal colour codes (torch.onnx's dynamo exporter writes
    them into its messages), or the exception's class name when it has no message.

    A line cut off mid-sentence (brackets left open, or a closing ``:``; the TorchScript exporter prints a tensor
    inside its sentence) goes on with the next lines, joined by spaces, up to ``limit`` characters; the first line
    itself is never cut. A line that ends in ``,`` or ``;`` after a whole sentence (torch.fx wraps its messages
    so) gives its whole sentences alone; without one, it goes on as above. A message with an ``## Exception
    summary`` section (torch.onnx's) gives that summary's first line: the cause, where the first line says only
    which step failed.
    """
    text = _TERMINAL_CODES.sub("", str(exc))
    if "## Exception summary" in text:
        text = text.split("## Exception summary", 1)[1]
    lines = [line.strip() for line in text.strip().splitlines() if line.strip()]
    if not lines:
        return type(exc).__name__
    out = lines[0]
    for line in lines[1:]:
        if len(out) >= limit or not (out.endswith(":") or _open_brackets(out) or _unfinished(out)):
            break
        out = f"{out} {line}"
    ends = _sentence_ends(out) if out.endswith((",", ";")) else []
    if ends:
        out = out[:ends[-1]]
    return out if len(out) <= max(limit, len(lines[0])) else out[:limit - 3] + "..."


def _sentence_ends(text: str) -> list[int]:
    """Where whole sentences of ``text`` end: a full stop before a capital, with every bracket closed."""
    return [m.end() for m in _SENTENCE_END.finditer(text) if not _open_brackets(text[:m.end()])]


def _unfinished(text: str) -> bool:
    """A clause cut by a line break (``,`` or ``;`` at the end) with no whole sentence before it."""
    return text.endswith((",", ";")) and not _sentence_ends(text)


def _open_brackets(text: str) -> bool:
    return any(text.count(a) > text.count(b) for a, b in ("()", "[]", "{}"))


def closest(word: str, choices: Iterable[str], n: int = 3, cutoff: float = 0.0) -> list[str]:
    """The ``n`` choices most like ``word``, best first, each at least ``cutoff`` similar.

    Similarity is difflib's ratio; ties go to the longer shared prefix, then to
    the order of ``choices`` (graph order for point names). difflib alone breaks
    ties alphabetically, so 'layer1_relu' would suggest 'layer4_1_relu' before
    'layer1_0_relu'.
    """
    scored = []
    for index, candidate in enumerate(choices):
        ratio = difflib.SequenceMatcher(None, word, candidate).ratio()
        if ratio >= cutoff:
            scored.append((-ratio, -len(os.path.commonprefix([word, candidate])), index, candidate))
    return [item[-1] for item in sorted(scored)[:n]]


def suggest(word: str, choices: Iterable[str], n: int = 3) -> str:
    """Return ``"; did you mean 'a', 'b'?"`` for close matches (see :func:`closest`), or ``""``."""
    close = closest(word, choices, n=n, cutoff=0.5)
    if not close:
        return ""
    return "; did you mean " + ", ".join(repr(c) for c in close) + "?"
