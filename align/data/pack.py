"""Pack a folder, CSV or JSONL of image-caption pairs into webdataset tar shards.

Every sample is checked before it is written: the image must decode completely (to the pixels the
tower will see), the caption must be UTF-8, non-empty and not too long, labels must be a flat JSON
object of finite values. A bad sample is skipped and listed in ``rejected.jsonl`` with its reason;
it never stops the pack.

Nothing valid is lost: the new pack is written into a staging folder inside OUT and moved into
place only when it succeeded, ``manifest.json`` last, so a folder that has one is complete. A pack
that packs nothing leaves an earlier pack in OUT as it was and writes its report to
``rejected-of-failed-pack.jsonl`` beside it. Other files in OUT (the feature cache) are kept.

Reject reasons: ``unreadable_image``, ``missing_image``, ``image_too_large`` (the header claims more
pixels than Pillow's ``MAX_IMAGE_PIXELS``), ``unsupported_pixels`` (32-bit integer or floating-point
samples), ``missing_caption``, ``empty_caption``, ``caption_too_long``, ``not_utf8``, ``bad_labels``,
``duplicate_key``, and ``bad_row`` (a CSV/JSONL row that cannot be parsed, or whose image or caption
is not text). With stored vectors (``vectors.py``), a row needs no image but a vector, and the vector
reasons join these: ``missing_vector``, ``vector_wrong_width``, ``vector_not_finite``, ``vector_zero``,
``duplicate_vector_key``, ``unmatched_vector``.

Labels are stored as an object of strings (numbers and booleans are written as their JSON text,
null values are dropped), so evaluation can compare label values without caring where they came from.
"""
from __future__ import annotations

import hashlib
import io
import json
import math
import os
import re
import shutil
import tarfile
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from PIL import Image, ImageFile
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn
from rich.table import Table

from ..artifacts import FAILED_PACK_REJECTED, MANIFEST, PACK_STAGING, REJECTED, SHARD_PATTERN, SPLITS
from ..errors import DataError
from ..fileio import write_text_atomic
from ..labels import canonical_labels
from .pixels import ImageTooLarge, UnsupportedPixels, open_image, to_rgb8
from .sources import Candidate, Reject, decode_utf8, list_source
from .vectors import StoredVectors, VectorSource, replace_stored_entries

FORMAT_VERSION = 1
# JPEG and PNG bytes are stored untouched (no generation loss); anything else becomes PNG
KEPT_FORMATS = {"JPEG": "jpg", "PNG": "png"}
PNG_MODES = {"1", "L", "LA", "I;16", "P", "RGB", "RGBA"}
_SHARD_NAME = re.compile(r"^(%s)-\d{6}\.tar$" % "|".join(SPLITS))


@dataclass
class _Sample:
    key: str
    image: bytes
    ext: str
    caption: str
    labels_json: str


def split_of(key: str, val_fraction: float) -> str:
    """Deterministic split by key hash, so a sample keeps its split when others are added."""
    bucket = int(hashlib.sha256(key.encode("utf-8")).hexdigest()[:8], 16) / 2**32  # in [0, 1)
    return "val" if bucket < val_fraction else "train"


# ---------------------------------------------------------------------------------------------
# checking one sample


def _label_value(name: str, value):
    """Labels are strings; JSON scalars keep their JSON spelling, nested values are refused."""
    if isinstance(value, str):
        return value
    if isinstance(value, float) and not math.isfinite(value):
        # Python's json reads NaN and Infinity, but they are no JSON numbers and equal nothing
        raise Reject("bad_labels", f"label {name!r} is {value!r}, not a finite number")
    if isinstance(value, (bool, int, float)):
        return json.dumps(value)
    raise Reject("bad_labels", f"label values must be scalars, got {type(value).__name__} for {name!r}")


def _normalise_labels(raw) -> dict:
    if not isinstance(raw, dict):
        raise Reject("bad_labels", f"labels must be a JSON object, got {type(raw).__name__}")
    return {str(k): _label_value(str(k), v) for k, v in raw.items() if v is not None}


def _read_bytes(path: Path, reason: str) -> bytes:
    try:
        return path.read_bytes()
    except OSError as exc:
        raise Reject(reason, f"cannot read {path}: {exc.strerror or exc}") from None


def _stored_image(image: Image.Image, data: bytes) -> tuple[bytes, str]:
    """The bytes to store: JPEG and PNG as they are, anything else re-encoded losslessly as PNG."""
    if image.format in KEPT_FORMATS:
        return data, KEPT_FORMATS[image.format]
    if image.mode.startswith("I;16") and image.mode != "I;16":
        image = Image.fromarray(np.asarray(image).astype(np.uint16))  # 16-bit kept, in PNG's own mode
    elif image.mode not in PNG_MODES:
        image = image.convert("RGBA" if "A" in image.getbands() else "RGB")
    buffer = io.BytesIO()
    image.save(buffer, format="PNG")
    return buffer.getvalue(), "png"


def _read_image(path: Path | None) -> tuple[bytes, str]:
    """The bytes to store and their extension; raises Reject unless the image decodes fully."""
    if path is None or not path.is_file():
        raise Reject("missing_image", f"no file at {path}")
    data = _read_bytes(path, "unreadable_image")
    truncated_ok = ImageFile.LOAD_TRUNCATED_IMAGES
    ImageFile.LOAD_TRUNCATED_IMAGES = False  # a truncated file must fail here, not later in training
    try:
        with open_image(data) as image:  # the size check comes before any pixel is decoded
            image.verify()  # structure and checksums (PNG); cheap
        with open_image(data) as image:
            image.load()  # every pixel: catches truncated JPEGs that verify() lets through
            to_rgb8(image, image.format)  # what the tower will see must exist too
            return _stored_image(image, data)
    except ImageTooLarge as exc:
        raise Reject("image_too_large", str(exc)) from None
    except UnsupportedPixels as exc:
        raise Reject("unsupported_pixels", f"{exc}; save it with 8- or 16-bit samples") from None
    except Exception as exc:  # PIL raises many types (OSError, SyntaxError, ValueError, ...)
        raise Reject("unreadable_image", f"{type(exc).__name__}: {exc}") from None
    finally:
        ImageFile.LOAD_TRUNCATED_IMAGES = truncated_ok


def _caption_of(candidate: Candidate, max_chars: int) -> str:
    if candidate.caption_path is not None:
        if not candidate.caption_path.is_file():
            raise Reject("missing_caption", f"no caption file {candidate.caption_path.name}")
        text = decode_utf8(_read_bytes(candidate.caption_path, "missing_caption"), "caption")
    elif candidate.caption is None:
        raise Reject("missing_caption", "the row has no caption")
    else:
        text = candidate.caption
    text = text.strip()
    if not text:
        raise Reject("empty_caption", "the caption is empty")
    if len(text) > max_chars:
        raise Reject("caption_too_long", f"{len(text)} characters > max_caption_chars={max_chars}")
    return text


def _labels_of(candidate: Candidate) -> dict:
    if candidate.labels_path is not None:
        if not candidate.labels_path.is_file():
            return {}
        text = decode_utf8(_read_bytes(candidate.labels_path, "bad_labels"), "labels")
        try:
            raw = json.loads(text)
        except json.JSONDecodeError as exc:
            raise Reject("bad_labels", f"not JSON: {exc}") from None
        return _normalise_labels(raw)
    return _normalise_labels(candidate.labels or {})


def check_sample(candidate: Candidate, max_chars: int, image_optional: bool = False) -> _Sample:
    """Read and validate one sample (cheap checks first); raises Reject. ``image_optional``: a row
    without an image is packed (its stored vector stands in for it)."""
    textual = image_optional and candidate.image_path is None and (candidate.problem or ("",))[0] == "missing_image"
    if candidate.problem and not textual:
        raise Reject(*candidate.problem)
    caption = _caption_of(candidate, max_chars)
    labels = _labels_of(candidate)
    image, ext = (b"", "") if textual else _read_image(candidate.image_path)
    return _Sample(candidate.key, image, ext, caption, canonical_labels(labels))


# ---------------------------------------------------------------------------------------------
# writing into the staging folder


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
    """Writes one split's shards into the staging folder, ``shard_size`` samples each."""

    def __init__(self, stage: Path, split: str, shard_size: int):
        self.stage, self.split, self.shard_size = stage, split, shard_size
        self.shards: list[str] = []
        self.samples = 0
        self.hash = _ContentHash()
        self._tar: tarfile.TarFile | None = None
        self._in_shard = 0

    def _open_next(self) -> None:
        self.finish()
        name = SHARD_PATTERN.format(split=self.split, index=len(self.shards))
        self._tar = tarfile.open(self.stage / name, "w", format=tarfile.PAX_FORMAT)
        self.shards.append(name)
        self._in_shard = 0

    def write(self, sample: _Sample) -> None:
        if self._tar is None or self._in_shard >= self.shard_size:
            self._open_next()
        members = {sample.ext: sample.image, "txt": sample.caption.encode("utf-8"),
                   "json": sample.labels_json.encode("utf-8")}
        members.pop("", None)  # a caption-and-vector sample has no image member
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
        if self._tar is not None:
            self._tar.close()
            self._tar = None


@dataclass
class _Packed:
    """What one pass over the candidates wrote into the staging folder."""
    writers: dict[str, _SplitWriter]
    overall: _ContentHash = field(default_factory=_ContentHash)
    rejects: list[dict] = field(default_factory=list)
    keys: set[str] = field(default_factory=set)
    label_fields: set[str] = field(default_factory=set)


def _write_samples(candidates: list[Candidate], stage: Path, *, val_fraction: float, shard_size: int,
                   max_caption_chars: int, console: Console, vectors: StoredVectors | None = None) -> _Packed:
    packed = _Packed({split: _SplitWriter(stage, split, shard_size) for split in SPLITS})
    with Progress(TextColumn("packing"), BarColumn(), MofNCompleteColumn(), TimeRemainingColumn(),
                  console=console, transient=True) as progress:
        task = progress.add_task("packing", total=len(candidates))
        for candidate in candidates:
            progress.advance(task)
            try:
                # a key is only taken by a sample that was packed; a rejected first copy frees it
                if candidate.key in packed.keys:
                    raise Reject("duplicate_key", f"key {candidate.key!r} is already used by another sample")
                sample = check_sample(candidate, max_caption_chars, image_optional=vectors is not None)
                if vectors is not None:
                    vectors.check(sample.key)
            except Reject as rej:
                packed.rejects.append({"source": candidate.source, "key": candidate.key,
                                       "reason": rej.reason, "detail": rej.detail})
                continue
            packed.keys.add(sample.key)
            packed.label_fields.update(json.loads(sample.labels_json))
            packed.writers[split_of(sample.key, val_fraction)].write(sample)
            packed.overall.add(sample)
            if vectors is not None:
                vectors.take(sample.key, split_of(sample.key, val_fraction))
    for writer in packed.writers.values():
        writer.finish()
    packed.rejects += vectors.unmatched({c.key for c in candidates}) if vectors is not None else []
    return packed


def _manifest(source: Path, candidates: list[Candidate], packed: _Packed, val_fraction: float) -> dict:
    by_reason = Counter(r["reason"] for r in packed.rejects)
    return {
        "format_version": FORMAT_VERSION,
        "source": str(source.resolve()),
        "counts": {"seen": len(candidates), "packed": len(packed.keys), "rejected": len(packed.rejects),
                   "rejected_by_reason": dict(sorted(by_reason.items()))},
        "splits": {split: {"samples": w.samples, "shards": list(w.shards), "content_hash": w.hash.hexdigest()}
                   for split, w in packed.writers.items()},
        "label_fields": sorted(packed.label_fields),
        "content_hash": packed.overall.hexdigest(),
        "val_fraction": val_fraction,
    }


# ---------------------------------------------------------------------------------------------
# the output folder


def _rejects_text(rejects: list[dict]) -> str:
    return "".join(json.dumps(r, ensure_ascii=False) + "\n" for r in rejects)


def _staging(out: Path) -> Path:
    """A fresh staging folder inside OUT (same file system, so moving files out of it is a rename)."""
    if out.exists() and not out.is_dir():
        raise DataError(f"--out {out} is a file", hint="pass a folder path (it is created if missing)")
    stage = out / PACK_STAGING
    try:
        out.mkdir(parents=True, exist_ok=True)
        if stage.exists():
            shutil.rmtree(stage)  # left by a pack that was killed
        stage.mkdir()
    except OSError as exc:
        raise DataError(f"cannot write into --out {out}: {exc.strerror or exc}",
                        hint="pass a folder you can write to") from None
    return stage


def _commit(stage: Path, out: Path, shards: list[str]) -> None:
    """Move the finished pack from STAGE into OUT. The old manifest goes first: for the few renames
    until the new one lands, readers refuse the folder instead of mixing two packs."""
    (out / MANIFEST).unlink(missing_ok=True)
    for name in shards:
        os.replace(stage / name, out / name)
    for path in out.iterdir():  # shards of an earlier, larger pack would otherwise look current
        if _SHARD_NAME.match(path.name) and path.name not in shards:
            path.unlink()
    os.replace(stage / REJECTED, out / REJECTED)
    replace_stored_entries(stage, out)  # stored vectors: this pack's, or none
    (out / FAILED_PACK_REJECTED).unlink(missing_ok=True)  # it spoke of an attempt this pack replaces
    os.replace(stage / MANIFEST, out / MANIFEST)
    stage.rmdir()


def _refuse_empty(source: Path, out: Path, candidates: list[Candidate], rejects: list[dict]) -> None:
    """Nothing packed: report why, beside whatever OUT already holds, which stays as it was."""
    report = out / FAILED_PACK_REJECTED
    write_text_atomic(report, _rejects_text(rejects))
    by_reason = Counter(r["reason"] for r in rejects)
    kept = " (the pack already there is unchanged)" if (out / MANIFEST).is_file() else ""
    raise DataError(f"nothing usable in {source}: {len(candidates)} samples seen, all rejected; "
                    f"see {report}{kept}",
                    hint="fix the samples for these reasons and pack again: "
                         + ", ".join(f"{k} x{v}" for k, v in sorted(by_reason.items())))


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


def _check_options(val_fraction: float, shard_size: int, max_caption_chars: int) -> None:
    if not 0.0 <= val_fraction <= 1.0:  # also refuses NaN, which fails every comparison
        raise DataError(f"val_fraction must be between 0 and 1, got {val_fraction}",
                        hint="use 0.1 to hold out about a tenth, 1.0 for an evaluation-only set")
    if shard_size < 1:
        raise DataError(f"shard_size must be at least 1, got {shard_size}", hint="use e.g. --shard-size 1000")
    if max_caption_chars < 1:
        raise DataError(f"max_caption_chars must be at least 1, got {max_caption_chars}",
                        hint="use e.g. --max-caption-chars 1000")


def _pack_into(stage: Path, source: Path, candidates: list[Candidate], out: Path, *, val_fraction: float,
               shard_size: int, max_caption_chars: int, console: Console, vectors: StoredVectors | None) -> dict:
    """Shards, ``rejected.jsonl`` and ``manifest.json`` in STAGE; OUT is not touched (but for the report
    of a pack that packed nothing)."""
    try:
        packed = _write_samples(candidates, stage, val_fraction=val_fraction, shard_size=shard_size,
                                max_caption_chars=max_caption_chars, console=console, vectors=vectors)
        if not packed.keys:
            _refuse_empty(source, out, candidates, packed.rejects)
        manifest = _manifest(source, candidates, packed, val_fraction)
        if vectors is not None:
            manifest["vectors"] = vectors.write_entries(stage, manifest["splits"])
        (stage / REJECTED).write_text(_rejects_text(packed.rejects), encoding="utf-8")
        (stage / MANIFEST).write_text(json.dumps(manifest, indent=2, ensure_ascii=False) + "\n", encoding="utf-8")
    except OSError as exc:  # a full disk, a folder that turned read-only
        raise DataError(f"cannot write the pack into {out}: {exc.strerror or exc}",
                        hint="free some space or pass another --out; an earlier pack there is unchanged") from None
    return manifest


def pack_source(source: str | Path, out: str | Path, *, val_fraction: float = 0.1, shard_size: int = 1000,
                max_caption_chars: int = 1000, image_roots: list[str | Path] | tuple = (),
                console: Console | None = None, vectors: VectorSource | None = None) -> dict:
    """Validate SOURCE and put shards, ``rejected.jsonl`` and (last) ``manifest.json`` into OUT.

    ``image_roots``: folders besides a CSV/JSONL's own that its rows may name images in.
    ``vectors``: stored vectors, matched to the samples by key (see ``vectors.py``).
    """
    console = console or Console()
    source, out = Path(source), Path(out)
    _check_options(val_fraction, shard_size, max_caption_chars)
    candidates = list_source(source, [Path(r) for r in image_roots])
    stored = StoredVectors(vectors) if vectors is not None else None
    stage = _staging(out)
    try:
        manifest = _pack_into(stage, source, candidates, out, val_fraction=val_fraction, shard_size=shard_size,
                              max_caption_chars=max_caption_chars, console=console, vectors=stored)
        _commit(stage, out, [name for split in SPLITS for name in manifest["splits"][split]["shards"]])
    finally:
        shutil.rmtree(stage, ignore_errors=True)  # gone after a commit; after a failure, the half pack
    _summary(console, manifest, out / REJECTED)
    return manifest
