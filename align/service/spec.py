"""A submitted job, validated and confined, as the spec the store keeps and the worker runs.

The recipe is checked before the job is queued, by the recipe module's own validation (a bad key
or value is a 422 naming the field), every path in it is resolved and confined to the configured
data roots, and what is stored is the fully resolved recipe: the worker runs exactly what was
validated, whatever happens to the recipe file afterwards.

Confinement covers every file a job reads, not only the folders named: a packed folder's manifest
and each shard its manifest lists, and every link inside a model folder or a gallery, each resolved
(links followed) and refused when it lands outside the roots. The worker runs the same checks again
before training, since a link can change after submission.
"""
from __future__ import annotations

import os
from pathlib import Path

from pydantic import BaseModel, ConfigDict, Field

from ..artifacts import MANIFEST
from ..data.shards import read_manifest
from ..errors import DataError, RecipeError
from ..recipe import Recipe, dump_recipe, recipe_from_toml
from .home import Home, Settings
from .security import PathRefused, check_name, confine
from .store import MAX_INTEGER

MAX_RECIPE_CHARS = 64_000
LINK_HINT = ("a job reads only files inside the data roots, links followed: copy the file in instead of linking "
             "to it, or start the service with --data-root naming where it lives")


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
    processes: int = Field(1, description="training processes (torchrun ranks), each with its share of the "
                           "global batch: one GPU each, or a share of the job's CPU cores")


def read_named_recipe(home: Home, name: str) -> str:
    if not name.endswith(".toml"):
        raise PathRefused(f"recipe_name {name!r} is not a .toml file", "name a file under HOME/recipes/, e.g. lora-cpu.toml")
    if Path(name).is_absolute():
        raise PathRefused(f"recipe_name {name!r} must be relative to HOME/recipes/")
    path = confine(name, [home.recipes.resolve()], "recipe_name")
    if not path.is_file():
        raise PathRefused(f"recipe_name {name!r} is not a file in HOME/recipes/")
    return path.read_text(encoding="utf-8")


def _confine_file(path: Path, roots: list[Path], what: str) -> Path:
    try:
        return confine(str(path), roots, what)
    except PathRefused as exc:
        raise PathRefused(exc.message, LINK_HINT + "; " + (exc.hint or "")) from None


def confine_tree(folder: Path, roots: list[Path], what: str) -> None:
    """Refuse a folder holding a link (to a file or a folder) that resolves outside the roots.

    rglob lists links but does not descend into linked folders, so every entry it yields sits below
    real folders of ``folder``: only the links themselves can lead elsewhere.
    """
    for path in folder.rglob("*"):
        if path.is_symlink():
            _confine_file(path, roots, f"{what}: the link")


def _listed_shards(manifest: dict, manifest_file: Path) -> list[tuple[str, str]]:
    """(split, shard name) for every shard the manifest lists; DataError when it is not shaped as pack writes it."""
    splits = manifest.get("splits")
    malformed = DataError(f"{manifest_file} does not list its shards the way `align pack` writes them",
                          "repack the source with `align pack SOURCE --out DIR`")
    if not isinstance(splits, dict):
        raise malformed
    listed = []
    for split, info in splits.items():
        shards = info.get("shards") if isinstance(info, dict) else None
        if not isinstance(shards, list) or not all(isinstance(name, str) and name for name in shards):
            raise malformed
        listed += [(split, name) for name in shards]
    return listed


def confine_packed(folder: Path, roots: list[Path], what: str) -> dict:
    """The manifest of a packed folder, once it and every shard it lists resolve inside the roots."""
    manifest_file = folder / MANIFEST
    if os.path.lexists(manifest_file):  # a missing one gets read_manifest's "not a packed folder" below
        _confine_file(manifest_file, roots, f"{what} manifest")
    manifest = read_manifest(folder)
    for split, name in _listed_shards(manifest, manifest_file):
        if Path(name).is_absolute() or ".." in Path(name).parts:
            raise PathRefused(f"{manifest_file} lists the {split} shard {name!r}, which is not a file of {folder}",
                              "a manifest names its shards relative to its folder; repack the source")
        shard = folder / name
        if not os.path.lexists(shard):
            raise DataError(f"the {split} shard {shard} listed in {manifest_file} is missing",
                            "copy the whole packed folder, or repack it with `align pack`")
        _confine_file(shard, roots, f"{what} {split} shard")
    return manifest


def confine_recipe_paths(recipe: Recipe, settings: Settings, data: str | None = None,
                         gallery: str | None = None) -> Recipe:
    """Resolve every path the recipe (and the job's gallery) reads or writes, refusing any outside the roots.

    The recipe's paths are replaced by their resolved form (in place); ``data`` replaces data.shards.
    """
    home = Home(settings.home)
    roots = settings.data_roots
    if data:
        recipe.data.shards = str(confine(data, roots, "data"))
    elif recipe.data.shards:
        recipe.data.shards = str(confine(recipe.data.shards, roots, "data.shards"))
    else:
        raise RecipeError("the job names no data (data.shards is empty)",
                          "send data=DIR, a folder written by `align pack` inside a data root")
    confine_packed(Path(recipe.data.shards), roots, "data")  # a clear error now, not when the job starts
    if recipe.vision.weights:
        recipe.vision.weights = str(confine(recipe.vision.weights, roots, "vision.weights"))
    if recipe.vision.model_path:  # a transformers folder, an .onnx or a program file
        recipe.vision.model_path = str(confine(recipe.vision.model_path, roots, "vision.model_path"))
        if Path(recipe.vision.model_path).is_dir():
            confine_tree(Path(recipe.vision.model_path), roots, "vision.model_path")
    if recipe.vision.preprocess.file:
        recipe.vision.preprocess.file = str(confine(recipe.vision.preprocess.file, roots, "vision.preprocess.file"))
    if recipe.text.model:
        recipe.text.model = str(confine(recipe.text.model, roots, "text.model"))
        if Path(recipe.text.model).is_dir():
            confine_tree(Path(recipe.text.model), roots, "text.model")
    if recipe.vision.feature_cache:
        recipe.vision.feature_cache = str(confine(recipe.vision.feature_cache, roots + [home.features.resolve()],
                                                  "vision.feature_cache"))
    else:
        recipe.vision.feature_cache = str(home.features.resolve())  # shared by every job; data roots stay unwritten
    if gallery:
        confine_gallery(gallery, roots)
    return recipe


def confine_gallery(raw: str, roots: list[Path]) -> Path:
    """The resolved gallery folder a job indexes: a packed folder (manifest and shards) or a folder of images."""
    folder = confine(raw, roots, "index")
    if not folder.is_dir():
        raise PathRefused(f"index {raw!r} is not a folder", "pass a packed folder or a folder of images")
    if (folder / MANIFEST).is_file():
        confine_packed(folder, roots, "index")
    else:
        confine_tree(folder, roots, "index")
    return folder


def _validated_recipe(request: JobRequest, home: Home) -> Recipe:
    """The submitted recipe with its overrides, through the recipe module's validation (RecipeError -> 422)."""
    if (request.recipe_toml is None) == (request.recipe_name is None):
        raise RecipeError("send the recipe as recipe_toml (TOML text) or recipe_name (a file under HOME/recipes/), "
                          "one of the two", 'for example {"recipe_name": "lora-cpu.toml", "data": "catalogue"}')
    text = request.recipe_toml if request.recipe_toml is not None else read_named_recipe(home, request.recipe_name)
    recipe = recipe_from_toml(text, request.overrides)
    if recipe.train.steps > MAX_INTEGER:
        raise RecipeError(f"train.steps = {recipe.train.steps} is beyond what the job store can count "
                          f"({MAX_INTEGER})", "for example train.steps=1000")
    return recipe


def _stored_form(recipe: Recipe) -> str:
    """The resolved recipe as the worker will read it back; it must validate again."""
    resolved = dump_recipe(recipe)
    try:
        recipe_from_toml(resolved)
    except RecipeError as exc:  # a value TOML cannot hold as written (a line break in a string, an odd table key)
        raise RecipeError(f"the recipe cannot be stored as TOML: {exc.message}",
                          "keep strings on one line and table keys to letters, digits, '_' and '-'") from None
    return resolved


def check_processes(processes: int, recipe: Recipe, settings: Settings) -> None:
    """A job's process count against its recipe and what the service holds (RecipeError when it cannot run)."""
    if isinstance(processes, bool) or not isinstance(processes, int) or processes < 1:
        raise RecipeError(f"processes must be a whole number of at least 1, got {processes!r}",
                          "for example processes=2: two training processes share each batch")
    if settings.gpus:
        if processes > settings.gpus:
            raise RecipeError(f"processes = {processes} asks for more GPUs than the service has ({settings.gpus})",
                              f"send processes={settings.gpus} or fewer: each process trains on a GPU of its own")
    elif processes > settings.cores_per_job:
        raise RecipeError(f"processes = {processes} asks for more CPU cores than a job gets here "
                          f"({settings.cores_per_job}: {settings.cores} cores over {settings.workers} worker(s))",
                          f"send processes={settings.cores_per_job} or fewer, or start the service with fewer --workers")
    if recipe.train.batch_size % processes:
        raise RecipeError(f"train.batch_size = {recipe.train.batch_size} does not split over {processes} processes",
                          f"each process holds an equal slice of the global batch: pick a batch size divisible by "
                          f"{processes}, e.g. train.batch_size={recipe.train.batch_size // processes * processes or processes}")


def build_spec(request: JobRequest, settings: Settings) -> tuple[str, dict, int]:
    """(job name, spec, steps) for a request; RecipeError / DataError / PathRefused when it is wrong."""
    recipe = _validated_recipe(request, Home(settings.home))
    if request.index and not request.export:
        raise RecipeError("index needs export", "send export=NAME too: the gallery is indexed for that export")
    check_processes(request.processes, recipe, settings)
    confine_recipe_paths(recipe, settings, request.data)
    name = check_name(request.name or recipe.name, "job name")
    export = check_name(request.export, "export name") if request.export else None
    index = confine_gallery(request.index, settings.data_roots) if request.index else None
    spec = {"recipe_toml": _stored_form(recipe), "data": recipe.data.shards, "export": export,
            "export_onnx": request.export_onnx, "index": str(index) if index else None,
            "processes": request.processes,
            "submitted": {"recipe_name": request.recipe_name, "overrides": list(request.overrides)}}
    return name, spec, recipe.train.steps
