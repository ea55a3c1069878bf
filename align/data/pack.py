"""Pack a folder, CSV or JSONL of image-caption pairs into webdataset tar shards.

Every sample is checked before it is written: the image must decode completely, the caption must be
UTF-8, non-empty and not too long, labels must be a flat JSON object. A bad sample is skipped and
listed in ``rejected.jsonl`` with its reason; it never stops the pack. ``manifest.json`` is written
last, so a folder that has one is complete.

Reject reasons: ``unreadable_image``, ``missing_image``, ``missing_caption``, ``empty_caption``,
``caption_too_long``, ``not_utf8``, ``bad_labels``, ``duplicate_key``, and ``bad_row`` (a CSV/JSONL
row that cannot be parsed at all).

Labels are stored as an object of strings (numbers and booleans are written as their JSON text,
null values are dropped), so evaluation can compare label values without caring where they came from.
"""
from __future__ import annotations

import csv
import hashlib
import io
import json
import os
import re
import tarfile
from collections import Counter
from dataclasses import dataclass
from pathlib import Path

from PIL import Image, ImageFile
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn
from rich.table import Table

from ..artifacts import MANIFEST, REJECTED, SHARD_PATTERN, SPLITS
from ..errors import DataError
from ..fileio import write_text_atomic
from ..labels import canonical_labels

FORMAT_VERSION = 1
IMAGE_SUFFIXES = (".jpg", ".jpeg", ".png", ".webp", ".bmp")
TABLE_SUFFIXES = (".csv", ".jsonl")
# JPEG and PNG bytes are stored untouched (no generation loss); anything else becomes PNG
KEPT_FORMATS = {"JPEG": "jpg", "PNG": "png"}
PNG_MODES = {"1", "L", "LA", "I", "I;16", "P", "RGB", "RGBA"}
_SHARD_NAME = re.compile(r"^(%s)-\d{6}\.tar$" % "|".join(SPLITS))


class _Reject(Exception):
    """A sample that cannot be packed; caught per sample, never escapes pack_source."""

    def __init__(self, reason: str, detail: str = ""):
        super().__init__(reason)
        self.reason = reason
        self.detail = detail


@dataclass
class _Candidate:
    """One sample as found in the source, before anything is read or checked."""
    key: str
    source: str                       # where a person finds it: a file path or "table.csv:LINE"
    image_path: Path | None
    caption: str | None = None        # table sources carry the caption text ...
    caption_path: Path | None = None  # ... folder sources a .txt beside the image
    labels: dict | None = None
    labels_path: Path | None = None
    problem: tuple[str, str] | None = None  # a reject already known while listing


@dataclass
class _Sample:
    key: str
    image: bytes
    ext: str
    caption: str
    labels_json: str


def sample_key(name: str) -> str:
    """Webdataset key of a path without its extension: no dots, slashes or spaces."""
    return re.sub(r"[^A-Za-z0-9_-]", "_", name)


def split_of(key: str, val_fraction: float) -> str:
    """Deterministic split by key hash, so a sample keeps its split when others are added."""
    bucket = int(hashlib.sha256(key.encode("utf-8")).hexdigest()[:8], 16) / 2**32  # in [0, 1)
    return "val" if bucket < val_fraction else "train"


def _label_value(value):
    """Labels are strings; JSON scalars keep their JSON spelling, nested values are refused."""
    if isinstance(value, str):
        return value
    if isinstance(value, (bool, int, float)):
        return json.dumps(value)
    raise _Reject("bad_labels", f"label values must be scalars, got {type(value).__name__}")


def _normalise_labels(raw) -> dict:
    if not isinstance(raw, dict):
        raise _Reject("bad_labels", f"labels must be a JSON object, got {type(raw).__name__}")
    return {str(k): _label_value(v) for k, v in raw.items() if v is not None}


def _decode_utf8(data: bytes, what: str) -> str:
    try:
        return data.decode("utf-8-sig")  # a leading BOM (common from spreadsheet tools) is dropped
    except UnicodeDecodeError as exc:
        raise _Reject("not_utf8", f"{what}: {exc}") from None


# ---------------------------------------------------------------------------------------------
# listing the source


def _list_folder(root: Path) -> list[_Candidate]:
    found = []
    for path in sorted(root.rglob("*")):
        if path.suffix.lower() not in IMAGE_SUFFIXES or not path.is_file():
            continue
        relative_path = path.relative_to(root)
        if any(part.startswith(".") for part in relative_path.parts):
            continue  # hidden files and folders: editor checkpoints, "._x.jpg" resource forks
        relative = relative_path.with_suffix("").as_posix()
        found.append(_Candidate(key=sample_key(relative), source=str(path), image_path=path,
                                caption_path=path.with_suffix(".txt"),
                                labels_path=path.with_suffix(".json")))
    return found


def _table_candidate(row: dict, base: Path, source: str) -> _Candidate:
    """A CSV/JSONL row: ``image`` and ``caption`` plus any other fields as labels."""
    image = row.get("image")
    image_name = image.strip() if isinstance(image, str) else ""
    key_name = re.sub(r"^(\./|/)+", "", Path(image_name).with_suffix("").as_posix()) if image_name else ""
    candidate = _Candidate(key=sample_key(key_name), source=source, image_path=None)
    if not image_name:
        candidate.problem = ("missing_image", "the row has no image path")
        return candidate
    path = Path(image_name)
    candidate.image_path = path if path.is_absolute() else base / path
    caption = row.get("caption")
    if caption is not None and not isinstance(caption, str):
        candidate.problem = ("bad_row", f"caption must be text, got {type(caption).__name__}")
    candidate.caption = caption
    candidate.labels = {k: v for k, v in row.items() if k not in ("image", "caption")}
    return candidate


def _has_undecodable(values) -> bool:
    """True when text decoded with surrogateescape held bytes that are not UTF-8."""
    for value in values:
        if isinstance(value, str):
            try:
                value.encode("utf-8")
            except UnicodeEncodeError:
                return True
    return False


def _list_csv(path: Path) -> list[_Candidate]:
    # surrogateescape keeps a bad byte in one row from making the whole file unreadable
    text = path.read_bytes().decode("utf-8", errors="surrogateescape").removeprefix("\ufeff")
    reader = csv.DictReader(io.StringIO(text, newline=""))
    fields = reader.fieldnames or []
    if "image" not in fields or "caption" not in fields:
        raise DataError(f"{path} has columns {fields}; it needs 'image' and 'caption'",
                        hint="name the header row image,caption[,label columns...]")
    found = []
    for row in reader:
        source = f"{path}:{reader.line_num}"
        if None in row:  # more cells than header columns
            candidate = _Candidate(key="", source=source, image_path=None,
                                   problem=("bad_row", "more cells than header columns"))
        else:
            row = {k: v for k, v in row.items() if not (k not in ("image", "caption") and v in (None, ""))}
            candidate = _table_candidate(row, path.parent, source)
        if _has_undecodable(list(row.keys()) + list(row.values())):
            candidate.problem = ("not_utf8", "the row holds bytes that are not UTF-8")
        found.append(candidate)
    return found


def _list_jsonl(path: Path) -> list[_Candidate]:
    found = []
    for number, raw in enumerate(path.read_bytes().splitlines(), start=1):
        if not raw.strip():
            continue
        source = f"{path}:{number}"
        try:
            row = json.loads(_decode_utf8(raw, "line"))
        except _Reject as rej:
            found.append(_Candidate(key="", source=source, image_path=None, problem=(rej.reason, rej.detail)))
            continue
        except json.JSONDecodeError as exc:
            found.append(_Candidate(key="", source=source, image_path=None, problem=("bad_row", str(exc))))
            continue
        if not isinstance(row, dict):
            found.append(_Candidate(key="", source=source, image_path=None,
                                    problem=("bad_row", "each line must be a JSON object")))
            continue
        found.append(_table_candidate(row, path.parent, source))
    return found


def list_source(source: Path) -> list[_Candidate]:
    """Every sample the source offers, sorted by key; equal keys keep listing order (path, line)."""
    if not source.exists():
        raise DataError(f"SOURCE {source} does not exist",
                        hint="pass a folder of images with same-name .txt captions, or a .csv/.jsonl "
                             "with image and caption columns")
    if source.is_dir():
        found = _list_folder(source)
        if not found:
            raise DataError(f"no images found under {source}",
                            hint=f"images must end in one of {', '.join(IMAGE_SUFFIXES)}, each with a "
                                 "same-name .txt caption beside it")
    elif source.suffix.lower() == ".csv":
        found = _list_csv(source)
    elif source.suffix.lower() == ".jsonl":
        found = _list_jsonl(source)
    else:
        raise DataError(f"SOURCE {source} is a {source.suffix or 'suffix-less'} file; align packs "
                        "folders, .csv and .jsonl",
                        hint="point SOURCE at the folder holding the images, or at a .csv/.jsonl listing them")
    return sorted(found, key=lambda c: c.key)  # stable sort: the first listed copy of a key wins


# ---------------------------------------------------------------------------------------------
# checking one sample


def _read_image(path: Path) -> tuple[bytes, str]:
    """The bytes to store and their extension; raises _Reject unless the image decodes fully."""
    if path is None or not path.is_file():
        raise _Reject("missing_image", f"no file at {path}")
    data = path.read_bytes()
    truncated_ok = ImageFile.LOAD_TRUNCATED_IMAGES
    ImageFile.LOAD_TRUNCATED_IMAGES = False  # a truncated file must fail here, not later in training
    try:
        with Image.open(io.BytesIO(data)) as image:
            image.verify()  # structure and checksums (PNG); cheap
        with Image.open(io.BytesIO(data)) as image:
            image.load()  # every pixel: catches truncated JPEGs that verify() lets through
            if image.format in KEPT_FORMATS:
                return data, KEPT_FORMATS[image.format]
            if image.mode not in PNG_MODES:
                image = image.convert("RGBA" if "A" in image.getbands() else "RGB")
            buffer = io.BytesIO()
            image.save(buffer, format="PNG")
            return buffer.getvalue(), "png"
    except Exception as exc:  # PIL raises many types (OSError, SyntaxError, ValueError, bomb errors)
        raise _Reject("unreadable_image", f"{type(exc).__name__}: {exc}") from None
    finally:
        ImageFile.LOAD_TRUNCATED_IMAGES = truncated_ok


def _caption_of(candidate: _Candidate, max_chars: int) -> str:
    if candidate.caption_path is not None:
        if not candidate.caption_path.is_file():
            raise _Reject("missing_caption", f"no caption file {candidate.caption_path.name}")
        text = _decode_utf8(candidate.caption_path.read_bytes(), "caption")
    elif candidate.caption is None:
        raise _Reject("missing_caption", "the row has no caption")
    else:
        text = candidate.caption
    text = text.strip()
    if not text:
        raise _Reject("empty_caption", "the caption is empty")
    if len(text) > max_chars:
        raise _Reject("caption_too_long", f"{len(text)} characters > max_caption_chars={max_chars}")
    return text


def _labels_of(candidate: _Candidate) -> dict:
    if candidate.labels_path is not None:
        if not candidate.labels_path.is_file():
            return {}
        text = _decode_utf8(candidate.labels_path.read_bytes(), "labels")
        try:
            raw = json.loads(text)
        except json.JSONDecodeError as exc:
            raise _Reject("bad_labels", f"not JSON: {exc}") from None
        return _normalise_labels(raw)
    return _normalise_labels(candidate.labels or {})


def check_sample(candidate: _Candidate, max_chars: int) -> _Sample:
    """Read and validate one sample (cheap checks first); raises _Reject."""
    if candidate.problem:
        raise _Reject(*candidate.problem)
    caption = _caption_of(candidate, max_chars)
    labels = _labels_of(candidate)
    image, ext = _read_image(candidate.image_path)
    return _Sample(candidate.key, image, ext, caption, canonical_labels(labels))


# ---------------------------------------------------------------------------------------------
# writing


class _ContentHash:
    """sha256 over (key, sha256(image), caption, canonical labels) records, fed in key order."""

    def __init__(self):
        self._hash = hashlib.sha256()

    def add(self, sample: _Sample) -> None:
        record = [sample.key, hashlib.sha256(sample.image).hexdigest(), sample.caption, sample.labels_json]
        self._hash.update(json.dumps(record, ensure_ascii=False).encode("utf-8") + b"\n")

    def hexdigest(self) -> str:
        return self._hash.hexdigest()


class _SplitWriter:
    """Writes one split's shards, each to a temporary name renamed into place when full."""

    def __init__(self, out: Path, split: str, shard_size: int):
        self.out, self.split, self.shard_size = out, split, shard_size
        self.shards: list[str] = []
        self.samples = 0
        self.hash = _ContentHash()
        self._tar: tarfile.TarFile | None = None
        self._in_shard = 0

    def _temp(self, name: str) -> Path:
        return self.out / f".{name}.partial"

    def _open_next(self) -> None:
        self._close_current()
        name = SHARD_PATTERN.format(split=self.split, index=len(self.shards))
        self._tar = tarfile.open(self._temp(name), "w", format=tarfile.PAX_FORMAT)
        self.shards.append(name)
        self._in_shard = 0

    def _close_current(self) -> None:
        if self._tar is None:
            return
        self._tar.close()
        name = self.shards[-1]
        os.replace(self._temp(name), self.out / name)
        self._tar = None

    def write(self, sample: _Sample) -> None:
        if self._tar is None or self._in_shard >= self.shard_size:
            self._open_next()
        members = {sample.ext: sample.image, "txt": sample.caption.encode("utf-8"),
                   "json": sample.labels_json.encode("utf-8")}
        # one sample's members sit next to each other (webdataset groups consecutive names by key)
        for ext in sorted(members):
            info = tarfile.TarInfo(f"{sample.key}.{ext}")
            info.size = len(members[ext])
            # fixed mtime/owner/mode: packing the same data twice gives byte-identical shards
            info.mtime, info.mode, info.uname, info.gname = 0, 0o444, "align", "align"
            self._tar.addfile(info, io.BytesIO(members[ext]))
        self._in_shard += 1
        self.samples += 1
        self.hash.add(sample)

    def finish(self) -> None:
        self._close_current()

    def abandon(self) -> None:
        """After an error: drop the half-written shard so nothing partial is left behind."""
        if self._tar is not None:
            try:
                self._tar.close()
            finally:
                self._temp(self.shards[-1]).unlink(missing_ok=True)
                self._tar = None


def _remove_stale_shards(out: Path, keep: set[str]) -> None:
    """Shards of an earlier, larger pack into the same folder would otherwise look current."""
    for path in out.iterdir():
        if _SHARD_NAME.match(path.name) and path.name not in keep:
            path.unlink()


def _summary(console: Console, manifest: dict, rejected_path: Path) -> None:
    table = Table(title=f"packed {manifest['source']}", show_edge=False)
    table.add_column("")
    table.add_column("samples", justify="right")
    table.add_column("shards", justify="right")
    for split in SPLITS:
        info = manifest["splits"][split]
        table.add_row(split, str(info["samples"]), str(len(info["shards"])))
    for reason, count in sorted(manifest["counts"]["rejected_by_reason"].items()):
        table.add_row(f"[yellow]rejected: {reason}[/]", str(count), "")
    console.print(table)
    if manifest["counts"]["rejected"]:
        console.print(f"rejected samples are listed in {rejected_path}")


def pack_source(source: str | Path, out: str | Path, *, val_fraction: float = 0.1, shard_size: int = 1000,
                max_caption_chars: int = 1000, console: Console | None = None) -> dict:
    """Validate SOURCE and write shards, ``rejected.jsonl`` and (last) ``manifest.json`` into OUT."""
    console = console or Console()
    source, out = Path(source), Path(out)
    if not 0.0 <= val_fraction <= 1.0:
        raise DataError(f"val_fraction must be between 0 and 1, got {val_fraction}",
                        hint="use 0.1 to hold out about a tenth, 1.0 for an evaluation-only set")
    if shard_size < 1:
        raise DataError(f"shard_size must be at least 1, got {shard_size}")
    if max_caption_chars < 1:
        raise DataError(f"max_caption_chars must be at least 1, got {max_caption_chars}")
    candidates = list_source(source)
    if out.exists() and not out.is_dir():
        raise DataError(f"--out {out} is a file", hint="pass a folder path (it is created if missing)")
    out.mkdir(parents=True, exist_ok=True)
    (out / MANIFEST).unlink(missing_ok=True)  # the folder is incomplete until the new one is written

    writers = {split: _SplitWriter(out, split, shard_size) for split in SPLITS}
    overall = _ContentHash()
    rejects: list[dict] = []
    packed_keys: set[str] = set()
    label_fields: set[str] = set()
    try:
        with Progress(TextColumn("packing"), BarColumn(), MofNCompleteColumn(), TimeRemainingColumn(),
                      console=console, transient=True) as progress:
            task = progress.add_task("packing", total=len(candidates))
            for candidate in candidates:
                progress.advance(task)
                try:
                    # a key is only taken by a sample that was packed; a rejected first copy frees it
                    if candidate.key in packed_keys:
                        raise _Reject("duplicate_key", f"key {candidate.key!r} is already used by another sample")
                    sample = check_sample(candidate, max_caption_chars)
                except _Reject as rej:
                    rejects.append({"source": candidate.source, "key": candidate.key,
                                    "reason": rej.reason, "detail": rej.detail})
                    continue
                packed_keys.add(sample.key)
                label_fields.update(json.loads(sample.labels_json))
                writers[split_of(sample.key, val_fraction)].write(sample)
                overall.add(sample)
        for writer in writers.values():
            writer.finish()
    except BaseException:
        for writer in writers.values():
            writer.abandon()
        raise

    rejected_path = out / REJECTED
    write_text_atomic(rejected_path, "".join(json.dumps(r, ensure_ascii=False) + "\n" for r in rejects))
    by_reason = Counter(r["reason"] for r in rejects)
    if not packed_keys:
        _remove_stale_shards(out, keep=set())
        raise DataError(f"nothing usable in {source}: {len(candidates)} samples seen, all rejected; "
                        f"see {rejected_path}",
                        hint="reasons: " + ", ".join(f"{k} x{v}" for k, v in sorted(by_reason.items())))
    manifest = {
        "format_version": FORMAT_VERSION,
        "source": str(source.resolve()),
        "counts": {"seen": len(candidates), "packed": len(packed_keys), "rejected": len(rejects),
                   "rejected_by_reason": dict(sorted(by_reason.items()))},
        "splits": {split: {"samples": w.samples, "shards": list(w.shards), "content_hash": w.hash.hexdigest()}
                   for split, w in writers.items()},
        "label_fields": sorted(label_fields),
        "content_hash": overall.hexdigest(),
        "val_fraction": val_fraction,
    }
    _remove_stale_shards(out, keep={name for w in writers.values() for name in w.shards})
    write_text_atomic(out / MANIFEST, json.dumps(manifest, indent=2, ensure_ascii=False) + "\n")
    _summary(console, manifest, rejected_path)
    return manifest
