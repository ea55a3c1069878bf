"""The image side of a split as a recipe wants it: the tower's cached features (built on a miss)
or the packed stored vectors (checked against the tower when the recipe names one), with the
fingerprint a run records; and building every cache a recipe needs ahead of training.
"""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from rich.console import Console

from ..data.shards import read_manifest
from ..errors import AlignError
from ..recipe import VisionConfig
from ..vision import FrozenImageTower, shared_image_tower
from .build import image_features
from .cache import FeatureSet
from .stored import check_stored_vectors, load_stored_features, stored_record


@dataclass
class ImageSide:
    """A split's image features, the tower that made or checked them (None for stored vectors
    alone), and the fingerprint a run records: the tower's, plus ``stored_vectors`` when the rows
    are stored vectors."""

    features: FeatureSet
    tower: FrozenImageTower | None
    fingerprint: dict


def split_features(cfg: VisionConfig, shards_dir: str | Path, split: str, console: Console, *, views: int = 1,
                   cache_dir: str | Path | None = None, processes: int = 1) -> ImageSide:
    """A split's frozen features as the recipe wants them: the tower's cache (built on a miss), or
    the packed stored vectors (checked against the tower when there is one)."""
    if not cfg.uses_stored_vectors:
        tower = shared_image_tower(cfg)
        feats = image_features(tower, shards_dir, split, cfg, console, views=views, cache_dir=cache_dir,
                               processes=processes)
        return ImageSide(feats, tower, tower.fingerprint)
    feats = load_stored_features(shards_dir, split)
    record = stored_record(feats)
    console.print(f"using stored {split} vectors of {record['model']} ({record['rows']} rows, no tower pass over "
                  f"the images) from {feats.path}")
    if cfg.source == "stored":
        side = {k: v for k, v in feats.fingerprint["tower"].items() if k != "vectors_sha256"}
        return ImageSide(feats, None, {**side, "stored_vectors": record})
    tower = shared_image_tower(cfg)
    check = check_stored_vectors(feats, tower, Path(shards_dir), cfg, console)
    if check is not None:
        record["check"] = {k: check[k] for k in ("rows", "min_cosine", "median_cosine", "threshold")}
    return ImageSide(feats, tower, {**tower.fingerprint, "stored_vectors": record})


def trained_image_side(cfg: VisionConfig, recorded: dict) -> tuple[FrozenImageTower | None, dict]:
    """A trained run's image side, for export: the recipe's tower (None for stored vectors alone)
    and the fingerprint to record, the tower's plus the stored vectors the run trained against.
    ``recorded``: the fingerprint the checkpoint's progress record holds."""
    if cfg.source == "stored":
        if not recorded:
            raise AlignError("the checkpoint records no image side", "train the run again with this version of align")
        return None, recorded
    tower = shared_image_tower(cfg)  # a service job reuses the tower it trained with
    stored = recorded.get("stored_vectors")
    return tower, {**tower.fingerprint, **({"stored_vectors": stored} if stored else {})}


# ---------------------------------------------------------------------------------------------
# ahead of training: `align features RECIPE`


def recipe_feature_sets(recipe) -> list[tuple[str, int]]:
    """(split, views) of every cache a recipe's training and evaluation will ask for, plain entries
    first (a K-view entry builds on its plain one; evaluate's linear probe reads the plain one)."""
    wanted = [(recipe.data.train_split, 1), (recipe.data.train_split, recipe.vision.views),
              (recipe.data.eval_split, 1)]
    return list(dict.fromkeys(wanted))


def build_recipe_features(recipe, console: Console | None = None, processes: int = 1) -> list[FeatureSet]:
    """Build (or reuse) every cache of ``recipe`` so training and evaluation start without the tower;
    ``processes`` > 1 embeds with that many local processes (one thread each)."""
    console = console or Console(stderr=True)
    if not recipe.data.shards:
        raise AlignError("the recipe names no data", "pass --set data.shards=DIR (a folder written by `align pack`)")
    shards_dir = Path(recipe.data.shards)
    splits = read_manifest(shards_dir)["splits"]
    sets = []
    for split, views in recipe_feature_sets(recipe):
        if not splits.get(split, {}).get("samples"):
            console.print(f"split '{split}' is empty; nothing to cache")
            continue
        sets.append(split_features(recipe.vision, shards_dir, split, console, views=views, processes=processes).features)
    return sets
