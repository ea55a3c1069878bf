"""Reading what ``align pack`` wrote: the manifest, a split's captions and labels, its images.

Every reader walks a split in one canonical order: shards in manifest order, samples in tar order.
``load_table`` and ``iter_images`` therefore agree row by row, which is what lets the feature cache
line image features up with captions by position.

Damage: an image that fails to decode is skipped and counted (``iter_images``' ``skipped``, the
feature cache's ``skipped.txt``); the rest of its shard is read as usual. A shard that is no longer
a whole tar archive (cut short, overwritten) stops the read with a ``DataError`` naming the file and
the byte where it breaks: past that point its samples can no longer be matched with their captions,
and only packing again brings them back.

webdataset (and the torch it imports) is loaded only by the functions that read tar members, so
asking for the manifest stays cheap.
"""
from __future__ import annotations

import json
import tarfile
from dataclasses import dataclass
from pathlib import Path
from typing import Iterator

from PIL import Image

from ..artifacts import MANIFEST, SPLITS
from ..errors import DataError
from .pixels import decode_image  # the tower's decoding; the feature build and align.load import it from here

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


def shard_damage(path: Path) -> str | None:
    """Where a shard stops being a whole tar archive, in words; None when every member is complete.

    Only headers are read (data is skipped by seeking), so this costs a few reads per member.
    """
    size = path.stat().st_size
    last = None
    try:
        with tarfile.open(path, "r:") as tar:
            for member in tar:
                end = member.offset_data + member.size
                if end > size:
                    return (f"it is cut short at byte {size:,}, inside member {member.name} "
                            f"(its data needs bytes {member.offset_data:,} to {end:,})")
                last = member.name
            next_header = tar.offset
    except tarfile.TarError as exc:
        # at byte 0 tarfile raises; later it stops at the first bad header, which the tail check finds
        return f"it is not a tar archive from byte 0 ({exc})"
    with path.open("rb") as fh:
        fh.seek(next_header)
        tail = fh.read()
    after = f"after member {last}" if last else "before its first member"
    if not tail:  # a complete archive ends with zero blocks after its last member
        return f"it is cut short at byte {size:,}, right {after}: its end-of-archive marker is missing"
    if tail.count(0) == len(tail):
        return None
    if len(tail) < tarfile.BLOCKSIZE:
        return f"it is cut short at byte {size:,}, inside the header {after}"
    return f"it has no readable tar header at byte {next_header:,} ({after})"


def _damage_error(path: Path) -> DataError:
    where = shard_damage(path)
    return DataError(f"shard {path} is damaged: {where}. align skips and counts single images that fail to "
                     "decode, but stops at a damaged shard: past the damage its samples can no longer be "
                     "matched with their captions",
                     hint=f"pack the source again into {path.parent} (`align pack SOURCE --out {path.parent}`); "
                          "the damaged pack stays in place until the new one is complete")


def _check_paths(shards: list[Path]) -> None:
    for path in shards:
        if shard_damage(path) is not None:
            raise _damage_error(path)


def _samples(shards: list[Path], expected: int, select=None) -> Iterator[dict]:
    """webdataset's own grouping of tar members into samples, in tar order, no shuffling.

    A shard cut at a member boundary or overwritten from a header on reads as a shorter one without
    an error of its own: when fewer or more than ``expected`` samples came, the shards are checked.
    """
    import webdataset

    # no node/worker splitting: every reader gets the whole split (the training table is built once
    # from it and opened by every rank), so the order never depends on how many processes are running
    dataset = webdataset.WebDataset([str(p) for p in shards], shardshuffle=False, empty_check=False,
                                    nodesplitter=None, workersplitter=None, select_files=select)
    seen = 0
    try:
        for sample in dataset:
            seen += 1
            yield sample
    except (tarfile.TarError, ValueError, OSError) as exc:
        _check_paths(shards)  # names the shard and the byte
        # webdataset appends (stream, url) to the exception's arguments; the first is the reason
        reason = exc.args[0] if exc.args else type(exc).__name__
        raise DataError(f"a shard in {shards[0].parent} could not be read: {reason}",
                        hint="the folder is damaged; " + _PACK_HINT + " again") from None
    if seen != expected:
        _check_paths(shards)


def check_split(shards_dir: str | Path, split: str) -> None:
    """DataError naming the first damaged shard of a split (file, byte). For a reader about to hand
    the split to worker processes: an error raised there comes back wrapped in its traceback."""
    _check_paths(split_shards(shards_dir, split))


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


def iter_table(shards_dir: str | Path, split: str) -> Iterator[tuple[str, str, dict]]:
    """(key, caption, labels) of a split in canonical order, one sample at a time: memory does not
    grow with the split (the training table is built from this stream). Image members are skipped,
    not decoded. The shards are checked now; damage found while reading raises ``DataError``."""
    shards = split_shards(shards_dir, split)
    expected = read_manifest(shards_dir)["splits"][split]["samples"]

    def generate():
        seen = 0
        for sample in _samples(shards, expected, select=_metadata_only):
            try:
                row = (sample["__key__"], sample["txt"].decode("utf-8"),
                       json.loads(sample["json"]) if "json" in sample else {})
            except (KeyError, UnicodeDecodeError, json.JSONDecodeError) as exc:
                _check_paths(shards)  # a sample cut off by a damaged shard: name the shard and the byte
                raise DataError(f"sample {sample['__key__']} in {sample.get('__url__', shards_dir)} has a damaged "
                                f"caption or labels member ({type(exc).__name__}: {exc})",
                                hint="the shards were changed after packing; " + _PACK_HINT + " again") from None
            seen += 1
            yield row
        if seen != expected:  # the shards are whole (or _samples had said so), yet hold other samples
            raise DataError(f"split '{split}' in {shards_dir} holds {seen} samples but its manifest "
                            f"says {expected}", hint="the shards were changed after packing; " + _PACK_HINT + " again")

    return generate()


def load_table(shards_dir: str | Path, split: str) -> SplitTable:
    """Keys, captions and labels of a split, held in memory (``iter_table`` streams them)."""
    rows = iter_table(shards_dir, split)
    keys, captions, labels = [], [], []
    for key, caption, sample_labels in rows:
        keys.append(key)
        captions.append(caption)
        labels.append(sample_labels)
    info = read_manifest(shards_dir)["splits"][split]
    return SplitTable(keys, captions, labels, info["content_hash"], split_shards(shards_dir, split))


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
    expected = read_manifest(shards_dir)["splits"][split]["samples"]

    def generate():
        for sample in _samples(shards, expected):
            member = _image_member(sample)
            if member is not None:
                yield sample["__key__"], member[0], member[1]

    return generate()


def iter_images(shards_dir: str | Path, split: str,
                skipped: list[str] | None = None) -> Iterator[tuple[str, Image.Image]]:
    """(key, RGB image) in the same order as ``load_table``.

    A sample whose image fails to decode is not yielded; its key is appended to ``skipped`` (when
    given) so the caller can report how many were lost and drop the matching table rows.
    """
    shards = split_shards(shards_dir, split)
    expected = read_manifest(shards_dir)["splits"][split]["samples"]

    def generate():
        for sample in _samples(shards, expected):
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
