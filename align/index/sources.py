"""Where a gallery's images, captions and labels come from: a packed folder or a plain folder of images.

A packed folder (``align pack``) is embedded split by split through the feature cache (a gallery
already embedded for training or evaluation costs no forward pass) and carries each sample's caption
and labels. A plain folder's keys are the image paths relative to it; an image's caption and labels,
when there are any, are the same-stem ``.txt`` and ``.json`` files beside it (``align pack``'s
folder layout). Undecodable images are skipped, counted and reported.
"""
from __future__ import annotations

import json
from pathlib import Path
from typing import Sequence

import numpy as np
import torch
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn

from .. import artifacts as A
from ..api import AlignedModel, open_rgb
from ..errors import AlignError, DataError

FOLDER_SUFFIXES = (".jpg", ".jpeg", ".png", ".webp", ".bmp", ".tif", ".tiff")


def is_packed(source: Path) -> bool:
    return (source / A.MANIFEST).is_file()


def folder_images(source: Path) -> list[str]:
    """Image files under a folder, as sorted POSIX paths relative to it (the index keys)."""
    found = [p.relative_to(source).as_posix() for p in source.rglob("*")
             if p.is_file() and p.suffix.lower() in FOLDER_SUFFIXES and not p.name.startswith(".")]
    return sorted(k for k in found if "\n" not in k)


def _progress(console: Console, what: str) -> Progress:
    return Progress(TextColumn(f"[bold]{what}"), BarColumn(), MofNCompleteColumn(), TimeRemainingColumn(),
                    console=console, transient=True)


def embed_folder(model: AlignedModel, source: Path, console: Console, batch_size: int = 64):
    """Embed every image of a plain folder; undecodable ones are skipped, counted and reported."""
    tower = model.image_tower
    keys = folder_images(source)
    if not keys:
        raise DataError(f"no images in {source}", f"put {', '.join(FOLDER_SUFFIXES)} files there, or pass a packed folder")
    kept, skipped, chunks, batch = [], [], [], []
    with _progress(console, "embedding gallery") as progress:
        task = progress.add_task("embed", total=len(keys))
        for key in keys:
            try:
                batch.append(tower.preprocess(open_rgb(source / key)))
                kept.append(key)
            except AlignError:
                skipped.append(key)
            if len(batch) == batch_size:
                chunks.append(tower.embed_pixels(torch.stack(batch)).numpy())  # (b, D)
                batch.clear()
            progress.advance(task)
        if batch:
            chunks.append(tower.embed_pixels(torch.stack(batch)).numpy())
    return kept, (np.concatenate(chunks) if chunks else np.zeros((0, tower.feature_dim), np.float32)), skipped


def embed_packed(model: AlignedModel, source: Path, console: Console):
    """Every split of a packed folder, through the feature cache (no forward pass when it is warm);
    an export trained against stored vectors alone takes the folder's packed stored vectors."""
    from ..data.shards import read_manifest
    from ..features import gallery_stored_features, image_features

    keys, chunks, skipped = [], [], []
    for split, info in read_manifest(source)["splits"].items():
        if not info["samples"]:
            continue
        feats = (image_features(model.image_tower, source, split, model.vision_config, console) if model.has_tower
                 else gallery_stored_features(model.image_side, source, split))
        keys += feats.keys
        skipped += feats.skipped
        chunks.append(feats.embeddings.float().numpy())
    return keys, np.concatenate(chunks).astype(np.float32), skipped


def images_for_keys(source: Path, keys: list[str]) -> dict[str, object]:
    """The source image of each key (a packed sample key, or a path relative to a folder)."""
    wanted, found = set(keys), {}
    if is_packed(source):
        from ..data.shards import iter_images, read_manifest

        for split, info in read_manifest(source)["splits"].items():
            if not info["samples"] or len(found) == len(wanted):
                continue
            for key, image in iter_images(source, split):
                if key in wanted:
                    found[key] = image
                    if len(found) == len(wanted):
                        break
    else:
        stems = {}
        for rel in folder_images(source):
            stems.setdefault(rel.rsplit(".", 1)[0], []).append(rel)
        for key in keys:
            path = source / key
            if not path.is_file() and len(stems.get(key, [])) == 1:
                path = source / stems[key][0]  # keys written without the file extension
            if path.is_file():
                found[key] = open_rgb(path)
    missing = [k for k in keys if k not in found]
    if missing:
        raise DataError(f"{len(missing)} of the sampled keys have no image in {source}: {', '.join(missing[:3])}",
                        "SOURCE must hold the images the embeddings were made from, under the same keys "
                        "(packed sample keys, or paths relative to the folder)")
    return found


# ---------------------------------------------------------------------------------------------
# captions and labels


def _flat_labels(raw) -> dict[str, str] | None:
    """A sidecar's labels as ``align pack`` stores them (strings; scalars as JSON text), or None if not flat."""
    if not isinstance(raw, dict):
        return None
    out = {}
    for field, value in raw.items():
        if value is None:
            continue
        if isinstance(value, (dict, list)):
            return None
        out[str(field)] = value if isinstance(value, str) else json.dumps(value)
    return out


def _folder_sidecars(source: Path, key: str) -> tuple[str | None, dict[str, str]]:
    base = source / key
    stem = base.with_suffix("") if base.suffix.lower() in FOLDER_SUFFIXES else base
    caption_path, labels_path = Path(f"{stem}.txt"), Path(f"{stem}.json")
    caption = None
    if caption_path.is_file():
        try:
            caption = caption_path.read_text(encoding="utf-8").strip() or None
        except UnicodeDecodeError:
            caption = None
    labels: dict[str, str] = {}
    if labels_path.is_file():
        try:
            labels = _flat_labels(json.loads(labels_path.read_text(encoding="utf-8"))) or {}
        except (UnicodeDecodeError, json.JSONDecodeError):
            labels = {}
    return caption, labels


def captions_and_labels(source: Path, keys: Sequence[str]) -> tuple[list[str | None], list[dict[str, str]]]:
    """Each key's caption (or None) and labels (or {}): from the packed table, or the folder's sidecars."""
    if is_packed(source):
        from ..data.shards import load_table, read_manifest

        by_key: dict[str, tuple[str, dict]] = {}
        for split, info in read_manifest(source)["splits"].items():
            if info["samples"]:
                table = load_table(source, split)
                by_key.update(zip(table.keys, zip(table.captions, table.labels)))
        found = [by_key.get(k, (None, {})) for k in keys]
    else:
        found = [_folder_sidecars(source, k) for k in keys]
    return [c for c, _ in found], [labels for _, labels in found]
