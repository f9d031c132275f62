"""The package version and the versions of the libraries a saved file depends on."""

from __future__ import annotations

__all__ = ["__version__", "library_versions"]

__version__ = "0.1.0"


def library_versions(*names: str) -> dict[str, str | None]:
    """``{"splice": …, name: installed version or None, …}`` for the distributions ``names``."""
    from importlib import metadata

    out: dict[str, str | None] = {"splice": __version__}
    for name in names:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = None
    return out
