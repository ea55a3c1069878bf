"""Listing what a source offers: a folder of images, or a CSV/JSONL table of image paths and captions.

Listing reads no image and checks no caption; it only finds the samples, each as a ``Candidate``
with a key and where a person finds it. Problems that are clear from the listing alone (a row that
does not parse, an image value that is not a path) ride along as the candidate's ``problem`` and
become rejects when the sample is checked. Problems with the table itself (no header, a column
named twice, no rows) are ``DataError``: nothing could be packed from it as intended.

Confinement: a table row may name only images under the table's own folder (after following
symlinks), unless ``image_roots`` names further folders. A table passed on from elsewhere
otherwise decides which files of this machine end up in the shards.
"""
from __future__ import annotations

import csv
import io
import json
import os
import re
from dataclasses import dataclass
from pathlib import Path

from ..errors import DataError

TABLE_COLUMNS = ("image", "caption", "key")  # every other column of a table is a label
IMAGE_SUFFIXES = (".jpg", ".jpeg", ".png", ".webp", ".bmp", ".tif", ".tiff")
_TABLE_HINT = "name the header row image,caption[,label columns...] and give each image one row below it"


class Reject(Exception):
    """A sample that cannot be packed: a reason from the fixed list and a detail for a person."""

    def __init__(self, reason: str, detail: str = ""):
        super().__init__(reason)
        self.reason = reason
        self.detail = detail


@dataclass
class Candidate:
    """One sample as found in the source, before anything is read or checked."""
    key: str
    source: str                       # where a person finds it: a file path or "table.csv:LINE"
    image_path: Path | None
    caption: str | None = None        # table sources carry the caption text ...
    caption_path: Path | None = None  # ... folder sources a .txt beside the image
    labels: dict | None = None
    labels_path: Path | None = None
    problem: tuple[str, str] | None = None  # a reject already known while listing
    outside: bool = False             # a table row naming an image outside the allowed folders


def sample_key(name: str) -> str:
    """Webdataset key of a path without its extension: no dots, slashes or spaces."""
    return re.sub(r"[^A-Za-z0-9_-]", "_", name)


def explicit_key(text: str) -> str:
    """The key a table's ``key`` column (or a stored-vectors keys file) names: an image suffix, if
    any, is dropped, so a key may be written as the image's path or as the key itself."""
    text = re.sub(r"^(\./|/)+", "", text.strip())
    if Path(text).suffix.lower() in IMAGE_SUFFIXES:
        text = Path(text).with_suffix("").as_posix()
    return sample_key(text)


def decode_utf8(data: bytes, what: str) -> str:
    try:
        return data.decode("utf-8-sig")  # a leading BOM (common from spreadsheet tools) is dropped
    except UnicodeDecodeError as exc:
        raise Reject("not_utf8", f"{what}: {exc}") from None


# ---------------------------------------------------------------------------------------------
# folders


def _list_folder(root: Path) -> list[Candidate]:
    found = []
    for path in sorted(root.rglob("*")):
        if path.suffix.lower() not in IMAGE_SUFFIXES or not path.is_file():
            continue
        relative_path = path.relative_to(root)
        if any(part.startswith(".") for part in relative_path.parts):
            continue  # hidden files and folders: editor checkpoints, "._x.jpg" resource forks
        relative = relative_path.with_suffix("").as_posix()
        found.append(Candidate(key=sample_key(relative), source=str(path), image_path=path,
                               caption_path=path.with_suffix(".txt"), labels_path=path.with_suffix(".json")))
    return found


# ---------------------------------------------------------------------------------------------
# tables


def _inside(path: Path, roots: list[Path]) -> bool:
    resolved = path.resolve()  # symlinks followed: a link in the folder that points elsewhere is elsewhere
    return any(resolved.is_relative_to(root) for root in roots)


def _table_candidate(row: dict, base: Path, source: str, roots: list[Path]) -> Candidate:
    """A CSV/JSONL row: ``image`` and ``caption`` plus any other fields as labels. A ``key`` column,
    when present, names the sample (a row packed with stored vectors needs no image, but a key)."""
    image = row.get("image")
    image_name = image.strip() if isinstance(image, str) else ""
    key_name = re.sub(r"^(\./|/)+", "", Path(image_name).with_suffix("").as_posix()) if image_name else ""
    named = row.get("key")
    key = explicit_key(named) if isinstance(named, str) and named.strip() else sample_key(key_name)
    candidate = Candidate(key=key, source=source, image_path=None)
    if image is not None and not isinstance(image, str):
        candidate.problem = ("bad_row", f"'image' must be a path (text), got {type(image).__name__} {image!r}")
        return candidate
    caption = row.get("caption")
    candidate.labels = {k: v for k, v in row.items() if k not in TABLE_COLUMNS}
    if not image_name:  # kept with its caption: stored vectors can stand in for the image
        candidate.caption = caption if isinstance(caption, str) else None
        candidate.problem = ("missing_image", "the row has no image path")
        return candidate
    path = Path(image_name)
    candidate.image_path = path if path.is_absolute() else base / path
    candidate.outside = not _inside(candidate.image_path, roots)
    if caption is not None and not isinstance(caption, str):
        candidate.problem = ("bad_row", f"caption must be text, got {type(caption).__name__}")
    candidate.caption = caption
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


def _read_table(path: Path) -> bytes:
    try:
        return path.read_bytes()
    except OSError as exc:
        raise DataError(f"cannot read {path}: {exc.strerror or exc}",
                        hint="check the file's permissions, or point SOURCE at a readable copy") from None


def _check_header(path: Path, fields: list[str]) -> None:
    if not fields:
        raise DataError(f"{path} is empty: it has no header row", hint=_TABLE_HINT)
    repeated = sorted({name for name in fields if fields.count(name) > 1})
    if repeated:
        # csv would keep only the last cell of a repeated column: a caption or label silently lost
        raise DataError(f"{path}'s header names column(s) {', '.join(map(repr, repeated))} more than once",
                        hint="give every column its own name; extra columns become labels")
    if "caption" not in fields or ("image" not in fields and "key" not in fields):
        raise DataError(f"{path} has columns {fields}; it needs 'image' (or, with stored vectors, 'key') and "
                        "'caption'", hint=_TABLE_HINT)


def _list_csv(path: Path, roots: list[Path]) -> list[Candidate]:
    # surrogateescape keeps a bad byte in one row from making the whole file unreadable
    text = _read_table(path).decode("utf-8", errors="surrogateescape").removeprefix("\ufeff")
    reader = csv.DictReader(io.StringIO(text, newline=""))
    found = []
    try:
        _check_header(path, reader.fieldnames or [])
        for row in reader:
            source = f"{path}:{reader.line_num}"
            if None in row:  # more cells than header columns
                candidate = Candidate(key="", source=source, image_path=None,
                                      problem=("bad_row", "more cells than header columns"))
            else:
                row = {k: v for k, v in row.items() if not (k not in TABLE_COLUMNS and v in (None, ""))}
                candidate = _table_candidate(row, path.parent, source, roots)
            if _has_undecodable(list(row.keys()) + list(row.values())):
                candidate.problem = ("not_utf8", "the row holds bytes that are not UTF-8")
            found.append(candidate)
    except csv.Error as exc:  # e.g. a cell over csv's field size limit: the rest cannot be trusted
        raise DataError(f"{path}: the row after line {reader.line_num} cannot be parsed as CSV: {exc}",
                        hint="check the quotes around that row; a cell that long is usually an unclosed quote") from None
    if not found:
        raise DataError(f"{path} has a header row but no data rows", hint=_TABLE_HINT)
    return found


def _list_jsonl(path: Path, roots: list[Path]) -> list[Candidate]:
    found = []
    for number, raw in enumerate(_read_table(path).splitlines(), start=1):
        if not raw.strip():
            continue
        source = f"{path}:{number}"
        try:
            row = json.loads(decode_utf8(raw, "line"))
        except Reject as rej:
            found.append(Candidate(key="", source=source, image_path=None, problem=(rej.reason, rej.detail)))
            continue
        except json.JSONDecodeError as exc:
            found.append(Candidate(key="", source=source, image_path=None, problem=("bad_row", str(exc))))
            continue
        if not isinstance(row, dict):
            found.append(Candidate(key="", source=source, image_path=None,
                                   problem=("bad_row", "each line must be a JSON object")))
            continue
        found.append(_table_candidate(row, path.parent, source, roots))
    if not found:
        raise DataError(f"{path} holds no rows", hint='write one JSON object per line: {"image": "a.jpg", '
                                                      '"caption": "..."} plus any label fields')
    return found


def _refuse_outside(table: Path, found: list[Candidate], roots: list[Path]) -> None:
    outside = [c for c in found if c.outside]
    if not outside:
        return
    first = outside[0]
    common = os.path.commonpath([str(c.image_path.resolve().parent) for c in outside])
    allowed = ", ".join(str(r) for r in roots)
    raise DataError(f"{len(outside)} row(s) of {table} name images outside {allowed}, e.g. {first.source} "
                    f"names {first.image_path}; a table may only name images under its own folder",
                    hint=f"if these images are meant to be packed, allow their folder: --image-root {common}")


def _list_table(path: Path, image_roots: list[Path]) -> list[Candidate]:
    roots = [path.parent.resolve(), *(root.resolve() for root in image_roots)]
    found = (_list_csv if path.suffix.lower() == ".csv" else _list_jsonl)(path, roots)
    _refuse_outside(path, found, roots)
    return found


def list_source(source: Path, image_roots: list[Path] | tuple = ()) -> list[Candidate]:
    """Every sample the source offers, sorted by key; equal keys keep listing order (path, line).

    ``image_roots``: folders besides a table's own that its rows may name images in.
    """
    if not source.exists():
        raise DataError(f"SOURCE {source} does not exist",
                        hint="pass a folder of images with same-name .txt captions, or a .csv/.jsonl "
                             "with image and caption columns")
    for root in image_roots:
        if not Path(root).is_dir():
            raise DataError(f"--image-root {root} is not a folder", hint="name an existing folder of images")
    if source.is_dir():
        found = _list_folder(source)
        if not found:
            raise DataError(f"no images found under {source}",
                            hint=f"images must end in one of {', '.join(IMAGE_SUFFIXES)}, each with a "
                                 "same-name .txt caption beside it")
    elif source.suffix.lower() in (".csv", ".jsonl"):
        found = _list_table(source, [Path(r) for r in image_roots])
    else:
        raise DataError(f"SOURCE {source} is a {source.suffix or 'suffix-less'} file; align packs "
                        "folders, .csv and .jsonl",
                        hint="point SOURCE at the folder holding the images, or at a .csv/.jsonl listing them")
    return sorted(found, key=lambda c: c.key)  # stable sort: the first listed copy of a key wins
