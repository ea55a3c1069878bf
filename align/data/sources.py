"""Listing what a source offers: a folder of images, or a CSV/JSONL table of image paths and captions.

Listing reads no image and checks no caption; it only finds the samples, each as a ``Candidate``
with a key and where a person finds it. ``iter_source`` streams them in the source's own order
(memory flat however large the table or folder); ``list_source`` is the same, sorted by key. Problems that are clear from the listing alone (a row that
does not parse, an image value that is not a path) ride along as the candidate's ``problem`` and
become rejects when the sample is checked. Problems with the table itself (no header, a column
named twice, no rows) are ``DataError``: nothing could be packed from it as intended.

Confinement: a table row may name only images under the table's own folder (after following
symlinks), unless ``image_roots`` names further folders. A table passed on from elsewhere
otherwise decides which files of this machine end up in the shards.
"""
from __future__ import annotations

import csv
import json
import os
import re
from collections.abc import Iterator
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
    order: tuple = ()                 # breaks ties between equal keys: the row number, or the path's parts


def candidate_order(candidate: Candidate) -> tuple:
    """Key order; equal keys in listing order (a table's rows, a folder's sorted paths)."""
    return candidate.key, candidate.order


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


def _image_files(folder: Path) -> Iterator[Path]:
    """Image files under FOLDER, in directory order (unsorted: a folder of millions is never held).
    Hidden files and folders are passed over (editor checkpoints, "._x.jpg" resource forks); linked
    folders are not entered, linked files are listed, an unreadable folder is skipped."""
    try:
        with os.scandir(folder) as entries:
            found = list(entries)  # one folder's entries; closed before descending
    except PermissionError:
        return
    for entry in found:
        if entry.name.startswith("."):
            continue
        if entry.is_dir(follow_symlinks=False):
            yield from _image_files(folder / entry.name)
        elif Path(entry.name).suffix.lower() in IMAGE_SUFFIXES and entry.is_file():
            yield folder / entry.name


def _iter_folder(root: Path) -> Iterator[Candidate]:
    listed = 0
    for path in _image_files(root):
        relative_path = path.relative_to(root)
        relative = relative_path.with_suffix("").as_posix()
        listed += 1
        yield Candidate(key=sample_key(relative), source=str(path), image_path=path,
                        caption_path=path.with_suffix(".txt"), labels_path=path.with_suffix(".json"),
                        order=relative_path.parts)  # sorted paths compare by their parts
    if not listed:
        raise DataError(f"no images found under {root}",
                        hint=f"images must end in one of {', '.join(IMAGE_SUFFIXES)}, each with a "
                             "same-name .txt caption beside it")


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


def _open_table(path: Path, **how):
    try:
        return open(path, **how)
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


def _iter_csv(path: Path, roots: list[Path]) -> Iterator[Candidate]:
    # surrogateescape keeps a bad byte in one row from making the whole file unreadable; utf-8-sig
    # drops a leading BOM (common from spreadsheet tools)
    with _open_table(path, encoding="utf-8-sig", errors="surrogateescape", newline="") as stream:
        reader = csv.DictReader(stream)
        rows = 0
        try:
            _check_header(path, reader.fieldnames or [])
            for rows, row in enumerate(reader, start=1):
                source = f"{path}:{reader.line_num}"
                if None in row:  # more cells than header columns
                    candidate = Candidate(key="", source=source, image_path=None,
                                          problem=("bad_row", "more cells than header columns"))
                else:
                    row = {k: v for k, v in row.items() if not (k not in TABLE_COLUMNS and v in (None, ""))}
                    candidate = _table_candidate(row, path.parent, source, roots)
                if _has_undecodable(list(row.keys()) + list(row.values())):
                    candidate.problem = ("not_utf8", "the row holds bytes that are not UTF-8")
                candidate.order = (rows,)
                yield candidate
        except csv.Error as exc:  # e.g. a cell over csv's field size limit: the rest cannot be trusted
            raise DataError(f"{path}: the row after line {reader.line_num} cannot be parsed as CSV: {exc}",
                            hint="check the quotes around that row; a cell that long is usually an unclosed "
                                 "quote") from None
    if not rows:
        raise DataError(f"{path} has a header row but no data rows", hint=_TABLE_HINT)


def _jsonl_lines(path: Path) -> Iterator[bytes]:
    """The file's lines as ``bytes.splitlines`` of the whole file would give them (a lone CR also
    ends a line), read one newline-ended piece at a time."""
    with _open_table(path, mode="rb") as stream:
        for piece in stream:
            yield from piece.splitlines()


def _jsonl_candidate(raw: bytes, source: str, path: Path, roots: list[Path]) -> Candidate:
    try:
        row = json.loads(decode_utf8(raw, "line"))
    except Reject as rej:
        return Candidate(key="", source=source, image_path=None, problem=(rej.reason, rej.detail))
    except json.JSONDecodeError as exc:
        return Candidate(key="", source=source, image_path=None, problem=("bad_row", str(exc)))
    if not isinstance(row, dict):
        return Candidate(key="", source=source, image_path=None, problem=("bad_row", "each line must be a JSON object"))
    return _table_candidate(row, path.parent, source, roots)


def _iter_jsonl(path: Path, roots: list[Path]) -> Iterator[Candidate]:
    rows = 0
    for number, raw in enumerate(_jsonl_lines(path), start=1):
        if not raw.strip():
            continue
        rows += 1
        candidate = _jsonl_candidate(raw, f"{path}:{number}", path, roots)
        candidate.order = (rows,)
        yield candidate
    if not rows:
        raise DataError(f"{path} holds no rows", hint='write one JSON object per line: {"image": "a.jpg", '
                                                      '"caption": "..."} plus any label fields')


def _iter_table(path: Path, image_roots: list[Path]) -> Iterator[Candidate]:
    """The table's rows; rows naming images outside the allowed folders are counted on the way and
    refused together at the end, before anything has been packed."""
    roots = [path.parent.resolve(), *(root.resolve() for root in image_roots)]
    outside, first, common = 0, None, ""
    for candidate in (_iter_csv if path.suffix.lower() == ".csv" else _iter_jsonl)(path, roots):
        if candidate.outside:
            outside += 1
            first = first or candidate
            parent = str(candidate.image_path.resolve().parent)
            common = os.path.commonpath([common, parent]) if common else parent
        yield candidate
    if outside:
        allowed = ", ".join(str(r) for r in roots)
        raise DataError(f"{outside} row(s) of {path} name images outside {allowed}, e.g. {first.source} "
                        f"names {first.image_path}; a table may only name images under its own folder",
                        hint=f"if these images are meant to be packed, allow their folder: --image-root {common}")


def iter_source(source: Path, image_roots: list[Path] | tuple = ()) -> Iterator[Candidate]:
    """Every sample the source offers, in the source's order (a table's rows; a folder's files in
    directory order), one at a time. Problems with the source itself raise ``DataError``: before the
    first candidate (a missing source, a bad header) or after the last (no rows, rows outside the
    allowed folders), so a caller that lists everything first packs nothing from a bad source.

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
        yield from _iter_folder(source)
    elif source.suffix.lower() in (".csv", ".jsonl"):
        yield from _iter_table(source, [Path(r) for r in image_roots])
    else:
        raise DataError(f"SOURCE {source} is a {source.suffix or 'suffix-less'} file; align packs "
                        "folders, .csv and .jsonl",
                        hint="point SOURCE at the folder holding the images, or at a .csv/.jsonl listing them")


def list_source(source: Path, image_roots: list[Path] | tuple = ()) -> list[Candidate]:
    """Every sample the source offers, sorted by key; equal keys keep listing order (row, path).
    Holds them all: ``align pack`` streams through ``iter_source`` instead."""
    return sorted(iter_source(source, image_roots), key=candidate_order)
