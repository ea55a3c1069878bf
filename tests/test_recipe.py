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


@pytest.mark.parametrize("override, key", [
    ("loss.block_size=-1", "loss.block_size"),
    ("loss.init_sigmoid_scale=0", "loss.init_sigmoid_scale"),
    ("loss.max_logit_scale=0", "loss.max_logit_scale"),
    ("loss.init_temperature=0", "loss.init_temperature"),
    ("loss.positives=labels", "loss.positives"),
    ("loss.kind=hinge", "loss.kind"),
    ("eval.recall_ks=[]", "eval.recall_ks"),
    ("eval.recall_ks=[0, 5]", "eval.recall_ks"),
    ("eval.prompts=[]", "eval.prompts"),
    ("eval.field_prompts={glaze = []}", "eval.field_prompts.glaze"),
    ("text.scratch.attention_heads=0", "text.scratch.attention_heads"),
])
def test_values_the_loss_and_metrics_would_refuse_are_named_by_key(override, key):
    # the loss and the metrics raise plain ValueErrors; the recipe names its key first, before any work
    with pytest.raises(RecipeError, match=key.replace(".", r"\.")) as err:
        recipe_from_toml("", [override])
    assert err.value.hint or "not one of" in err.value.message


def test_scratch_tower_size_has_its_own_table():
    r = recipe_from_toml("[text]\nkind = \"scratch\"\n[text.scratch]\nwidth = 64\nlayers = 2\n"
                         "attention_heads = 8\nvocabulary_size = 500\n")
    assert (r.text.scratch.width, r.text.scratch.layers, r.text.scratch.attention_heads,
            r.text.scratch.vocabulary_size, r.text.scratch.dropout) == (64, 2, 8, 500, 0.1)
    assert recipe_from_toml("", ["text.scratch.width=32"]).text.scratch.width == 32
    with pytest.raises(RecipeError, match="divisible"):
        recipe_from_toml("", ["text.kind=scratch", "text.scratch.width=30", "text.scratch.attention_heads=4"])
    with pytest.raises(RecipeError, match="text.scratch.widht") as err:
        recipe_from_toml("", ["text.scratch.widht=32"])
    assert "width" in err.value.hint
    # the old flat keys are refused with their new name
    with pytest.raises(RecipeError, match="'text.depth' is now 'text.scratch.layers'") as err:
        recipe_from_toml("[text]\ndepth = 2\n")
    assert "[text.scratch]" in err.value.hint


def test_overrides_parse_toml_values_and_bare_strings():
    r = recipe_from_toml("", ["train.lr=3e-4", "train.steps=7", "data.shards=/tmp/x y", "eval.recall_ks=[1, 2]"])
    assert (r.train.lr, r.train.steps, r.data.shards, r.eval.recall_ks) == (3e-4, 7, "/tmp/x y", [1, 2])


def test_resolved_recipe_round_trips():
    r = recipe_from_toml("", ["train.steps=9", "text.kind=scratch", "text.scratch.layers=2",
                              'eval.field_prompts={glaze = ["a {} tile"]}'])
    again = recipe_from_toml(dump_recipe(r))
    assert again == r and again.text.scratch.layers == 2


def test_readme_recipe_reference_is_current():
    # the README's recipe table is generated from the schema (tools/recipe_reference.py)
    import subprocess
    import sys

    tool = Path(__file__).resolve().parent.parent / "tools" / "recipe_reference.py"
    assert subprocess.run([sys.executable, str(tool), "--check"]).returncode == 0, \
        "README recipe reference is stale: run tools/recipe_reference.py"
