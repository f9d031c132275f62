"""Recipes: how ``splice tune`` trains, as validated dataclasses read from TOML.

Six recipes ship with splice (``recipes/*.toml``): ``baseline``, ``warp-only``, ``joint`` and ``staged``
train on labelled data; ``label-free`` and ``batchnorm-stats`` adapt to a new site from unlabelled images.
``load_recipe(NAME)`` reads a shipped one; ``load_recipe("path/to/file.toml")``
reads a file. Every key is checked: an unknown key or a bad value raises
:class:`~splice.errors.RecipeError` naming the key, the file and what is allowed.

A recipe file (schema version 1)::

    schema_version = 1
    mode = "joint"            # baseline | warp-only | joint | staged | label-free | batchnorm-stats
    optimizer = "adamw"       # sgd | adamw
    lr = 0.001
    ...
    [augment]                 # training-time distortions (splice.recipes.sections.Ranges)
    rotation = 10.0
    [pretrain]                # warp-head pre-training with known warps
    epochs = 20
    [site]                    # label-free only: outer limits of the range estimate, the site objective
    objective = "consistency"

The resolved recipe (after command-line overrides) is written into the run
folder as ``recipe.toml`` by :func:`dump_recipe`; it is read back only through
these dataclasses (:meth:`Recipe.from_dict`), never by importing names from the
file.

One module per concern: :mod:`.checks` (value checks with one error wording),
:mod:`.sections` (the ``[augment]``, ``[pretrain]`` and ``[site]`` tables, which share one
:class:`~splice.recipes.sections.Ranges` dataclass for their distortion
ranges), :mod:`.recipe` (the :class:`Recipe` itself) and :mod:`.files`
(shipped recipes, reading and writing TOML).
"""

from __future__ import annotations

from .files import dump_recipe, load_recipe, recipe_to_toml, shipped_recipes
from .recipe import LABEL_FREE_MODES, MODES, OPTIMIZERS, RECIPE_SCHEMA_VERSION, REFERENCES, SCHEDULES, Recipe
from .sections import OBJECTIVES, Augment, Pretrain, Ranges, Site

__all__ = [
    "RECIPE_SCHEMA_VERSION",
    "MODES",
    "LABEL_FREE_MODES",
    "OBJECTIVES",
    "OPTIMIZERS",
    "SCHEDULES",
    "REFERENCES",
    "Ranges",
    "Augment",
    "Pretrain",
    "Site",
    "Recipe",
    "load_recipe",
    "shipped_recipes",
    "dump_recipe",
    "recipe_to_toml",
]
