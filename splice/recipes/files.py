"""The shipped recipes, reading recipe files and writing resolved recipes as TOML."""

from __future__ import annotations

import os
import sys
from collections.abc import Mapping
from importlib import resources
from pathlib import Path
from typing import Any

from ..errors import RecipeError, suggest
from .recipe import SECTIONS, Recipe

if sys.version_info >= (3, 11):
    import tomllib as _toml
else:  # pragma: no cover - Python 3.10
    import tomli as _toml

__all__ = ["load_recipe", "shipped_recipes", "dump_recipe", "recipe_to_toml"]

# The shipped .toml files live in the top-level ``recipes/`` folder. In a source
# checkout (and an editable install) that is ``<repo>/recipes``; an installed
# wheel carries them as the package data ``splice.recipe_files``.
_DATA_PACKAGE = "splice.recipe_files"


def _recipe_root():
    # the checkout this package was imported from comes first: an editable install
    # of another checkout would otherwise answer for splice.recipe_files
    here = Path(__file__).resolve().parents[2] / "recipes"
    if (here / "baseline.toml").is_file():
        return here
    try:
        return resources.files(_DATA_PACKAGE)
    except ModuleNotFoundError:
        pass
    raise RecipeError(
        "the shipped recipes are missing from this installation (no recipes/ folder and no "
        f"{_DATA_PACKAGE} package data); reinstall splice, or pass a recipe file with --recipe path.toml"
    )


def shipped_recipes() -> list[str]:
    """Names of the recipes shipped with splice."""
    return sorted(p.name[:-5] for p in _recipe_root().iterdir() if p.name.endswith(".toml"))


def _read_toml(text: str, where: str) -> dict:
    try:
        return _toml.loads(text)
    except _toml.TOMLDecodeError as exc:
        raise RecipeError(f"{where} is not valid TOML ({exc}); fix the syntax") from None
    except RecursionError:
        raise RecipeError(f"{where} nests its arrays or tables too deeply to read; a recipe is flat key = value "
                          "pairs and a few tables — fix the file") from None


def load_recipe(recipe: str | os.PathLike | Recipe | Mapping) -> Recipe:
    """Load a shipped recipe by name (``"joint"``) or a ``.toml`` file by path.

    >>> load_recipe("warp-only").mode
    'warp-only'
    """
    if isinstance(recipe, Recipe):
        return recipe
    if isinstance(recipe, Mapping):
        return Recipe.from_dict(recipe)
    text_name = os.fspath(recipe)
    path = Path(text_name)
    looks_like_path = text_name.endswith(".toml") or os.sep in text_name or "/" in text_name
    if looks_like_path:
        if not path.is_file():
            raise RecipeError(
                f"recipe file '{path}' does not exist; give a path to a .toml file or one of the shipped "
                f"recipes: {', '.join(shipped_recipes())}"
            )
        try:
            text = path.read_text(encoding="utf-8")
        except (OSError, UnicodeDecodeError) as exc:
            raise RecipeError(f"cannot read recipe file '{path}' ({exc})") from None
        return Recipe.from_dict(_read_toml(text, f"recipe file '{path}'"), where=f"recipe file '{path}'",
                                name=path.stem)
    names = shipped_recipes()
    if text_name not in names:
        raise RecipeError(
            f"unknown recipe {text_name!r}{suggest(text_name, names) or ';'} use one of "
            f"{', '.join(names)}, or a path to a .toml file"
        )
    text = (_recipe_root() / f"{text_name}.toml").read_text(encoding="utf-8")
    where = f"shipped recipe '{text_name}'"
    return Recipe.from_dict(_read_toml(text, where), where=where, name=text_name)


# ----------------------------------------------------------------------------- writing


def _toml_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        return repr(v)
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    if isinstance(v, Mapping):
        return "{ " + ", ".join(f"{k} = {_toml_value(x)}" for k, x in v.items()) + " }"
    raise TypeError(f"cannot write {type(v).__name__} to TOML")


def recipe_to_toml(recipe: Recipe) -> str:
    """The recipe as TOML text that :func:`load_recipe` reads back to an equal recipe."""
    d = recipe.to_dict()
    lines = [f"# resolved splice recipe '{recipe.name}'", f"schema_version = {d.pop('schema_version')}"]
    sections = {k: d.pop(k) for k in SECTIONS}
    if recipe.mode != "label-free" and recipe.site == SECTIONS["site"]():
        del sections["site"]  # only the label-free recipe reads [site]; a default one is left out
    lines += [f"{k} = {_toml_value(v)}" for k, v in d.items()]
    for sec, values in sections.items():
        lines += ["", f"[{sec}]"] + [f"{k} = {_toml_value(v)}" for k, v in values.items()]
    return "\n".join(lines) + "\n"


def dump_recipe(recipe: Recipe, path: str | os.PathLike) -> Path:
    """Write the resolved recipe atomically (TOML); an existing file is replaced only when it is a ``.toml``
    (:func:`splice.folders.check_file_target`)."""
    from ..fileio import atomic_write_text
    from ..folders import check_file_target

    check_file_target(path, "recipe target", "recipe.toml", suffix=".toml")
    return atomic_write_text(path, recipe_to_toml(recipe))
