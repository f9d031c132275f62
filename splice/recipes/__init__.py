"""Recipes: how ``splice tune`` trains, as validated dataclasses read from TOML.

Four recipes ship with splice (``recipes/*.toml``): ``baseline``, ``warp-only``, ``joint`` and ``staged``.
``load_recipe(NAME)`` reads a shipped one; ``load_recipe("path/to/file.toml")``
reads a file. Every key is checked: an unknown key or a bad value raises
:class:`~splice.errors.RecipeError` naming the key, the file and what is allowed.

A recipe file (schema version 1)::

    schema_version = 1
    mode = "joint"            # baseline | warp-only | joint | staged
    optimizer = "adamw"       # sgd | adamw
    lr = 0.001
    ...
    [augment]                 # training-time distortions (splice.recipes.sections.Ranges)
    rotation = 10.0
    [pretrain]                # warp-head pre-training with known warps
    epochs = 20

The resolved recipe (after command-line overrides) is written into the run
folder as ``recipe.toml`` by :func:`dump_recipe`; it is read back only through
these dataclasses (:meth:`Recipe.from_dict`), never by importing names from the
file.

One module per concern: :mod:`.checks` (value checks with one error wording),
:mod:`.sections` (the ``[augment]`` and ``[pretrain]`` tables, which share one
:class:`~splice.recipes.sections.Ranges` dataclass for their distortion
ranges), :mod:`.recipe` (the :class:`Recipe` itself) and :mod:`.files`
(shipped recipes, reading and writing TOML).
"""

from __future__ import annotations

from .files import dump_recipe, load_recipe, recipe_to_toml, shipped_recipes
from .recipe import MODES, OPTIMIZERS, RECIPE_SCHEMA_VERSION, REFERENCES, SCHEDULES, Recipe
from .sections import Augment, Pretrain, Ranges

__all__ = [
    "RECIPE_SCHEMA_VERSION",
    "MODES",
    "OPTIMIZERS",
    "SCHEDULES",
    "REFERENCES",
    "Ranges",
    "Augment",
    "Pretrain",
    "Recipe",
    "load_recipe",
    "shipped_recipes",
    "dump_recipe",
    "recipe_to_toml",
]
