"""Recipes: the shipped files, TOML round trips, every validation error, overrides."""

from __future__ import annotations

import textwrap

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from splice.errors import RecipeError
from splice.recipes import (
    MODES,
    RECIPE_SCHEMA_VERSION,
    Recipe,
    dump_recipe,
    load_recipe,
    recipe_to_toml,
    shipped_recipes,
)


def _write(tmp_path, body: str, name: str = "r.toml"):
    path = tmp_path / name
    path.write_text(textwrap.dedent(body), encoding="utf-8")
    return path


def test_shipped_recipes_load_and_cover_every_mode():
    names = shipped_recipes()
    assert {"baseline", "warp-only", "joint", "staged"} <= set(names)
    modes = {load_recipe(n).mode for n in names}
    assert modes == set(MODES)


def test_shipped_recipes_have_the_documented_roles():
    joint = load_recipe("joint")
    assert joint.warp_lr_scale < 1  # warp heads train slower than the base in joint mode
    assert load_recipe("warp-only").base_frozen(0)
    staged = load_recipe("staged")
    assert 0 < staged.warp_only_epochs < staged.epochs
    assert staged.base_frozen(0) and not staged.base_frozen(staged.warp_only_epochs)
    assert staged.with_overrides(epochs=5).warp_only_epochs == round(5 * staged.warp_only_fraction)
    assert not load_recipe("baseline").uses_warps
    for name in ("warp-only", "joint", "staged"):
        assert load_recipe(name).pretrain.epochs > 0


@pytest.mark.parametrize("name", ["baseline", "warp-only", "joint", "staged", "label-free", "batchnorm-stats"])
def test_resolved_recipe_round_trips_through_toml(tmp_path, name):
    recipe = load_recipe(name).with_overrides(epochs=3, lr=0.02)
    path = dump_recipe(recipe, tmp_path / "recipe.toml")
    again = load_recipe(path)
    assert again.to_dict() | {"name": ""} == recipe.to_dict() | {"name": ""}
    assert recipe_to_toml(again) .splitlines()[1:] == recipe_to_toml(recipe).splitlines()[1:]


def test_overrides_apply_and_are_validated():
    base = load_recipe("joint")
    r = base.with_overrides(epochs=2, lr=0.5, batch_size=8, seed=7)
    assert (r.epochs, r.lr, r.batch_size, r.seed) == (2, 0.5, 8, 7)
    assert base.epochs != 2  # the original is untouched
    assert base.with_overrides() is base
    with pytest.raises(RecipeError, match=r"--lr -1.*lr must be a number > 0"):
        base.with_overrides(lr=-1)
    with pytest.raises(RecipeError, match=r"--batch-size 0.*batch_size must be an integer >= 1"):
        base.with_overrides(batch_size=0)


def test_file_recipe_with_only_some_keys_takes_defaults(tmp_path):
    path = _write(tmp_path, f"""
        schema_version = {RECIPE_SCHEMA_VERSION}
        mode = "warp-only"
        lr = 0.01
        [augment]
        rotation = 5
        [pretrain]
        epochs = 2
        scale = [0.9, 1.1]
    """, "mine.toml")
    r = load_recipe(path)
    assert r.name == "mine" and r.mode == "warp-only" and r.lr == 0.01
    assert r.augment.rotation == 5.0 and r.pretrain.scale == (0.9, 1.1)
    assert r.pretrain.to_range().scale == (0.9, 1.1)
    assert r.optimizer == Recipe().optimizer


BAD = [
    # (body without schema_version, pattern the error must match)
    ('epoch = 3', r"unknown key 'epoch'; did you mean 'epochs', .*\? allowed keys: .*warp_lr_scale"),
    ('learning_rate = 0.1', r"unknown key 'learning_rate'; allowed keys: name, mode, optimizer, lr,"),
    ('optimizer = "adam"', r"optimizer = 'adam' is not allowed; did you mean 'adamw'\? use one of 'sgd', 'adamw'"),
    ('schedule = "linear"', r"schedule = 'linear' is not allowed.* 'cosine', 'step', 'constant'"),
    ('mode = "frozen"', r"mode = 'frozen' is not allowed.*'baseline', 'warp-only', 'joint', 'staged'"),
    ('lr = -0.1', r"lr must be a number > 0 and <= 10; got -0.1"),
    ('lr = "fast"', r"lr must be a number .*got 'fast'"),
    ('epochs = 2.5', r"epochs must be an integer >= 0; got 2.5"),
    ('epochs = -1', r"epochs must be an integer >= 0; got -1"),
    ('batch_size = 0', r"batch_size must be an integer >= 1; got 0"),
    ('warp_lr_scale = 0', r"warp_lr_scale must be a number > 0"),
    ('weight_decay = -1', r"weight_decay must be a number >= 0"),
    ('label_smoothing = 1.5', r"label_smoothing must be a number >= 0 and <= 0.99"),
    ('grad_clip = -1', r"grad_clip must be a number >= 0.*0 switches clipping off"),
    ('freeze = "conv1"', r"freeze must be a list of module-name patterns"),
    ('freeze = [3]', r"freeze must be a list of module-name patterns"),
    ('identity_reg_decay = 2', r"identity_reg_decay must be a number >= 0 and <= 1"),
    ('eval_every = 0', r"eval_every must be an integer >= 1"),
    ('patience = -2', r"patience must be an integer >= 0"),
    ('seed = true', r"seed must be an integer >= 0; got True"),
    ('normalisation = "imagenet"', r"normalisation must be 'auto', 'none', or \{mean"),
    ('normalisation = { mean = [0.5], std = [0] }', r"one positive std per channel"),
    ('warp_only_fraction = 1.5', r"warp_only_fraction must be a number >= 0 and <= 1"),
    ('augment = 3', r"'augment' must be a table"),
    ('[augment]\nrotate = 10', r"unknown key 'augment.rotate'.*allowed keys in \[augment\]: rotation"),
    ('[augment]\nrotation = 200', r"augment.rotation must be a number >= 0 and <= 180"),
    ('[augment]\nscale = [1.2, 0.8]', r"augment.scale must be a pair \[low, high\] with 0 < low <= high"),
    ('[augment]\nhflip = "yes"', r"augment.hflip must be true or false"),
    ('[augment]\ncrop = 1', r"augment.crop must be a number >= 0 and <= 0.99"),
    ('[pretrain]\nepochs = -3', r"pretrain.epochs must be an integer >= 0"),
    ('[pretrain]\nlr = 0', r"pretrain.lr must be a number > 0"),
    ('[pretrain]\nreference = ""', r"pretrain.reference must be 'auto', 'train', or a data set"),
    ('[pretrain]\nwarps = 1', r"unknown key 'pretrain.warps'.*allowed keys in \[pretrain\]"),
]


@pytest.mark.parametrize("body,pattern", BAD, ids=[b.split("=")[0].strip() for b, _ in BAD])
def test_every_bad_key_or_value_names_key_file_and_allowed_values(tmp_path, body, pattern):
    path = _write(tmp_path, f"schema_version = 1\n{body}\n", "bad.toml")
    with pytest.raises(RecipeError, match=r"recipe file '.*bad\.toml'") as info:
        load_recipe(path)
    assert info.match(pattern)


def test_schema_version_is_required_and_checked(tmp_path):
    with pytest.raises(RecipeError, match=r"no schema_version; add 'schema_version = 1'"):
        load_recipe(_write(tmp_path, 'lr = 0.1\n', "a.toml"))
    with pytest.raises(RecipeError, match=r"schema_version = 7 is not supported.*version 1"):
        load_recipe(_write(tmp_path, 'schema_version = 7\n', "b.toml"))


def test_unreadable_recipes(tmp_path):
    with pytest.raises(RecipeError, match=r"not valid TOML .*fix the syntax"):
        load_recipe(_write(tmp_path, 'schema_version = 1\nlr = = 2\n', "broken.toml"))
    with pytest.raises(RecipeError, match=r"recipe file '.*missing\.toml' does not exist.*baseline"):
        load_recipe(tmp_path / "missing.toml")
    with pytest.raises(RecipeError, match=r"unknown recipe 'jiont'; did you mean 'joint'\? use one of baseline"):
        load_recipe("jiont")
    with pytest.raises(RecipeError, match=r"must be a table of keys, got list"):
        Recipe.from_dict([1, 2])  # type: ignore[arg-type]


# keys and a few values of each kind, good and bad, for the property test
_VALUES = st.one_of(st.integers(-3, 300), st.floats(allow_nan=True, allow_infinity=True),
                    st.booleans(), st.sampled_from(["sgd", "adamw", "cosine", "step", "joint", "auto", "x", ""]),
                    st.lists(st.floats(0.125, 2.0), max_size=3))
_KEYS = st.sampled_from([f for f in Recipe().to_dict() if f not in ("schema_version", "augment", "pretrain")]
                        + ["bogus"])


@settings(max_examples=150, deadline=None)
@given(st.dictionaries(_KEYS, _VALUES, max_size=6),
       st.dictionaries(st.sampled_from(["rotation", "scale", "shift", "crop", "hflip", "bad"]), _VALUES, max_size=3))
def test_parser_either_builds_a_valid_recipe_or_raises_recipe_error(top, augment):
    data = {"schema_version": 1, **top}
    if augment:
        data["augment"] = augment
    try:
        recipe = Recipe.from_dict(data)
    except RecipeError as exc:
        assert "recipe" in str(exc)
        return
    # a recipe that builds survives its own round trip
    import tomllib

    assert Recipe.from_dict(tomllib.loads(recipe_to_toml(recipe))).to_dict() == recipe.to_dict()
