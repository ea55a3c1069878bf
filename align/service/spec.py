"""A submitted job, validated and confined, as the spec the store keeps and the worker runs.

The recipe is checked before the job is queued (a bad key or value is a 422 naming the field),
every path in it is resolved and confined to the configured data roots, and what is stored is
the fully resolved recipe: the worker runs exactly what was validated, whatever happens to the
recipe file afterwards.
"""
from __future__ import annotations

from pathlib import Path

from pydantic import BaseModel, ConfigDict, Field

from ..data.shards import read_manifest
from ..errors import RecipeError
from ..recipe import Recipe, dump_recipe, recipe_from_toml
from .home import Home, Settings
from .security import PathRefused, check_name, confine

MAX_RECIPE_CHARS = 64_000


class JobRequest(BaseModel):
    """The body of ``POST /jobs``. Send ``recipe_toml`` or ``recipe_name``, not both."""

    model_config = ConfigDict(extra="forbid")

    recipe_toml: str | None = Field(None, max_length=MAX_RECIPE_CHARS, description="the recipe as TOML text")
    recipe_name: str | None = Field(None, max_length=200, description="a recipe file under HOME/recipes/")
    overrides: list[str] = Field(default_factory=list, max_length=100,
                                 description="section.key=value overrides, as align train --set takes them")
    data: str | None = Field(None, max_length=4096, description="packed data folder inside a data root; "
                             "replaces data.shards (relative = inside the first data root)")
    name: str | None = Field(None, max_length=64, description="job name (default: the recipe's name)")
    export: str | None = Field(None, max_length=64, description="after training, export to HOME/exports/<export>")
    export_onnx: bool = Field(False, description="the export includes text_encoder.onnx (checked with onnxruntime)")
    index: str | None = Field(None, max_length=4096, description="with export: index this gallery (a packed "
                              "folder or a folder of images inside a data root) into HOME/indexes/<export>")


def read_named_recipe(home: Home, name: str) -> str:
    if not name.endswith(".toml"):
        raise PathRefused(f"recipe_name {name!r} is not a .toml file", "name a file under HOME/recipes/, e.g. lora-cpu.toml")
    if Path(name).is_absolute():
        raise PathRefused(f"recipe_name {name!r} must be relative to HOME/recipes/")
    path = confine(name, [home.recipes.resolve()], "recipe_name")
    if not path.is_file():
        raise PathRefused(f"recipe_name {name!r} is not a file in HOME/recipes/")
    return path.read_text(encoding="utf-8")


def confine_recipe_paths(recipe: Recipe, settings: Settings, data: str | None = None) -> Recipe:
    """Resolve every path the recipe reads or writes, refusing any outside the allowed roots (in place)."""
    home = Home(settings.home)
    roots = settings.data_roots
    if data:
        recipe.data.shards = str(confine(data, roots, "data"))
    elif recipe.data.shards:
        recipe.data.shards = str(confine(recipe.data.shards, roots, "data.shards"))
    else:
        raise RecipeError("the job names no data (data.shards is empty)",
                          "send data=DIR, a folder written by `align pack` inside a data root")
    read_manifest(recipe.data.shards)  # a clear error now, not when the job starts
    if recipe.vision.weights:
        recipe.vision.weights = str(confine(recipe.vision.weights, roots, "vision.weights"))
    if recipe.text.model:
        recipe.text.model = str(confine(recipe.text.model, roots, "text.model"))
    if recipe.vision.feature_cache:
        recipe.vision.feature_cache = str(confine(recipe.vision.feature_cache, roots + [home.features.resolve()],
                                                  "vision.feature_cache"))
    else:
        recipe.vision.feature_cache = str(home.features.resolve())  # shared by every job; data roots stay unwritten
    return recipe


def build_spec(request: JobRequest, settings: Settings) -> tuple[str, dict, int]:
    """(job name, spec, steps) for a request; RecipeError / DataError / PathRefused when it is wrong."""
    home = Home(settings.home)
    if (request.recipe_toml is None) == (request.recipe_name is None):
        raise RecipeError("send the recipe as recipe_toml (TOML text) or recipe_name (a file under HOME/recipes/), "
                          "one of the two")
    text = request.recipe_toml if request.recipe_toml is not None else read_named_recipe(home, request.recipe_name)
    recipe = recipe_from_toml(text, request.overrides)
    confine_recipe_paths(recipe, settings, request.data)
    name = check_name(request.name or recipe.name, "job name")
    export = check_name(request.export, "export name") if request.export else None
    index = None
    if request.index:
        if not export:
            raise RecipeError("index needs export", "send export=NAME too: the gallery is indexed for that export")
        index = confine(request.index, settings.data_roots, "index")
        if not index.is_dir():
            raise PathRefused(f"index {request.index!r} is not a folder", "pass a packed folder or a folder of images")
    resolved = dump_recipe(recipe)
    recipe_from_toml(resolved)  # what the worker will read back must validate too
    spec = {"recipe_toml": resolved, "data": recipe.data.shards, "export": export, "export_onnx": request.export_onnx,
            "index": str(index) if index else None,
            "submitted": {"recipe_name": request.recipe_name, "overrides": list(request.overrides)}}
    return name, spec, recipe.train.steps
