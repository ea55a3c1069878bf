"""Reading what ``align pack`` wrote: the manifest, a split's captions and labels, its images.

Every reader walks a split in one canonical order: shards in manifest order, samples in tar order.
``load_table`` and ``iter_images`` therefore agree row by row, which is what lets the feature cache
line image features up with captions by position.

webdataset (and the torch it imports) is loaded only by the functions that read tar members, so
asking for the manifest stays cheap.
"""
from __future__ import annotations

import io
import json
import tarfile
from dataclasses import dataclass
from pathlib import Path
from typing import Iterator

from PIL import Image, ImageOps

from ..artifacts import MANIFEST, SPLITS
from ..errors import DataError

IMAGE_EXTENSIONS = ("jpg", "png")  # what pack writes (anything else was re-encoded as PNG)
_PACK_HINT = "run `align pack SOURCE --out DIR` first"


def read_manifest(shards_dir: str | Path) -> dict:
    """The manifest of a packed folder; DataError when the folder was never (fully) packed."""
    path = Path(shards_dir) / MANIFEST
    if not path.is_file():
        raise DataError(f"no {MANIFEST} in {shards_dir}: it is not a packed data folder, or packing "
                        "did not finish", hint=_PACK_HINT)
    try:
        manifest = json.loads(path.read_text(encoding="utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise DataError(f"{path} is not valid JSON ({exc})", hint=_PACK_HINT + " again") from None
    if not isinstance(manifest, dict) or manifest.get("format_version") != 1:
        raise DataError(f"{path} has an unknown format_version "
                        f"{manifest.get('format_version') if isinstance(manifest, dict) else None!r}",
                        hint="repack the source with this version of align")
    return manifest


def _empty_split_hint(split: str) -> str:
    if split == "val":
        return "repack with `--val-fraction 0.1` (or larger) so the val split gets samples"
    return "repack with a `--val-fraction` below 1.0 so the train split gets samples"


def split_shards(shards_dir: str | Path, split: str, *, allow_empty: bool = False) -> list[Path]:
    """The split's shard files in manifest order, each checked to exist."""
    if split not in SPLITS:
        raise DataError(f"unknown split {split!r}", hint=f"use one of {', '.join(SPLITS)}")
    manifest = read_manifest(shards_dir)
    info = manifest["splits"].get(split, {"samples": 0, "shards": []})
    if not info["samples"] and not allow_empty:
        raise DataError(f"split '{split}' in {shards_dir} is empty", hint=_empty_split_hint(split))
    paths = [Path(shards_dir) / name for name in info["shards"]]
    missing = [p.name for p in paths if not p.is_file()]
    if missing:
        raise DataError(f"{len(missing)} shard(s) listed in the manifest are missing from {shards_dir}: "
                        f"{', '.join(missing[:3])}", hint="copy the whole folder, or " + _PACK_HINT)
    return paths


def _samples(urls: list[str], select=None) -> Iterator[dict]:
    """webdataset's own grouping of tar members into samples, in tar order, no shuffling."""
    import webdataset

    # no node/worker splitting: every reader gets the whole split (in training, rank 0 reads it and
    # shares the table), so the order never depends on how many processes are running
    dataset = webdataset.WebDataset(urls, shardshuffle=False, empty_check=False, nodesplitter=None,
                                    workersplitter=None, select_files=select)
    try:
        yield from dataset
    except (tarfile.TarError, ValueError, OSError) as exc:
        raise DataError(f"a shard could not be read: {exc}", hint="the folder is damaged; " + _PACK_HINT + " again") from None


def _metadata_only(name: str) -> bool:
    return name.endswith((".txt", ".json"))


@dataclass
class SplitTable:
    """A split's text side, row i belonging to the i-th image of ``iter_images``."""
    keys: list[str]
    captions: list[str]
    labels: list[dict]
    content_hash: str
    shards: list[Path]

    def __len__(self) -> int:
        return len(self.keys)


def load_table(shards_dir: str | Path, split: str) -> SplitTable:
    """Keys, captions and labels of a split; image members are skipped, not decoded."""
    shards = split_shards(shards_dir, split)
    manifest = read_manifest(shards_dir)
    keys, captions, labels = [], [], []
    for sample in _samples([str(p) for p in shards], select=_metadata_only):
        keys.append(sample["__key__"])
        captions.append(sample["txt"].decode("utf-8"))
        labels.append(json.loads(sample["json"]) if "json" in sample else {})
    expected = manifest["splits"][split]["samples"]
    if len(keys) != expected:
        raise DataError(f"split '{split}' in {shards_dir} holds {len(keys)} samples but its manifest "
                        f"says {expected}", hint="the shards were changed after packing; " + _PACK_HINT + " again")
    return SplitTable(keys, captions, labels, manifest["splits"][split]["content_hash"], shards)


def _image_member(sample: dict) -> tuple[bytes, str] | None:
    for ext in IMAGE_EXTENSIONS:
        if ext in sample:
            return sample[ext], ext
    return None


def iter_image_bytes(shards_dir: str | Path, split: str) -> Iterator[tuple[str, bytes, str]]:
    """(key, raw image bytes, extension) in canonical order, for decoding in DataLoader workers.

    A sample without an image member is left out; ``iter_images`` reports such samples.
    """
    shards = split_shards(shards_dir, split)  # checked now, not at the first next()

    def generate():
        for sample in _samples([str(p) for p in shards]):
            member = _image_member(sample)
            if member is not None:
                yield sample["__key__"], member[0], member[1]

    return generate()


def decode_image(data: bytes) -> Image.Image:
    """Decode packed bytes to an upright RGB image (EXIF orientation applied, as a viewer shows it)."""
    with Image.open(io.BytesIO(data)) as image:
        image = ImageOps.exif_transpose(image)
        return image.convert("RGB")


def iter_images(shards_dir: str | Path, split: str,
                skipped: list[str] | None = None) -> Iterator[tuple[str, Image.Image]]:
    """(key, RGB image) in the same order as ``load_table``.

    A sample whose image fails to decode is not yielded; its key is appended to ``skipped`` (when
    given) so the caller can report how many were lost and drop the matching table rows.
    """
    shards = split_shards(shards_dir, split)

    def generate():
        for sample in _samples([str(p) for p in shards]):
            member = _image_member(sample)
            try:
                if member is None:
                    raise OSError("no image member")
                image = decode_image(member[0])
            except Exception:  # PIL raises many types for damaged data
                if skipped is not None:
                    skipped.append(sample["__key__"])
                continue
            yield sample["__key__"], image

    return generate()
