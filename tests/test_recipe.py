"""Recipes: shipped files load, mistakes are named with a fix, the resolved form round-trips."""
from __future__ import annotations

from pathlib import Path

import pytest

from align.errors import RecipeError
from align.recipe import dump_recipe, load_recipe, recipe_from_toml

RECIPES = sorted((Path(__file__).resolve().parent.parent / "recipes").glob("*.toml"))


@pytest.mark.parametrize("path", RECIPES, ids=lambda p: p.name)
def test_shipped_recipes_load_and_every_key_is_commented(path):
    load_recipe(path)
    for line in path.read_text().splitlines():
        if "=" in line and not line.lstrip().startswith("#"):
            assert "#" in line, f"{path.name}: uncommented key: {line}"


def test_unknown_key_is_named_with_a_suggestion():
    with pytest.raises(RecipeError, match="train.stpes") as err:
        recipe_from_toml("[train]\nstpes = 3\n")
    assert "steps" in err.value.hint


def test_bad_values_are_rejected_before_work():
    with pytest.raises(RecipeError, match="train.steps must be int"):
        recipe_from_toml("", ["train.steps=abc"])
    with pytest.raises(RecipeError, match="not one of"):
        recipe_from_toml("", ["text.kind=giant"])
    with pytest.raises(RecipeError, match="chunk_size"):
        recipe_from_toml("", ["train.batch_size=8", "train.chunk_size=16"])
    with pytest.raises(RecipeError, match="no '\\{\\}'"):
        recipe_from_toml("", ['eval.prompts=["no slot"]'])


def test_overrides_parse_toml_values_and_bare_strings():
    r = recipe_from_toml("", ["train.lr=3e-4", "train.steps=7", "data.shards=/tmp/x y", "eval.recall_ks=[1, 2]"])
    assert (r.train.lr, r.train.steps, r.data.shards, r.eval.recall_ks) == (3e-4, 7, "/tmp/x y", [1, 2])


def test_resolved_recipe_round_trips():
    r = recipe_from_toml("", ["train.steps=9", "text.kind=scratch", 'eval.field_prompts={glaze = ["a {} tile"]}'])
    again = recipe_from_toml(dump_recipe(r))
    assert again == r


def test_readme_recipe_reference_is_current():
    # the README's recipe table is generated from the schema (tools/recipe_reference.py)
    import subprocess
    import sys

    tool = Path(__file__).resolve().parent.parent / "tools" / "recipe_reference.py"
    assert subprocess.run([sys.executable, str(tool), "--check"]).returncode == 0, \
        "README recipe reference is stale: run tools/recipe_reference.py"
