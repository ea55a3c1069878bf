"""Checking one candidate and encoding it into the bytes its shard will hold: the work a pack
worker does, independent of every other sample (so any process may do it, in any order).

Every sample is checked before it is written: the image must decode completely (to the pixels the
tower will see), the caption must be UTF-8, non-empty and not too long, labels must be a flat JSON
object of finite values. A failed check raises ``Reject`` with its reason (listed in ``pack.py``).

A passed sample becomes its tar members, already encoded (``Checked.members``): the writing
process only appends bytes, so shards come out the same whichever process checked the sample.
"""
from __future__ import annotations

import hashlib
import io
import json
import math
import re
import tarfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from PIL import Image, ImageFile

from ..labels import canonical_labels
from .pixels import ImageTooLarge, UnsupportedPixels, open_image, to_rgb8
from .sources import Candidate, Reject, decode_utf8

# JPEG and PNG bytes are stored untouched (no generation loss); anything else becomes PNG
KEPT_FORMATS = {"JPEG": "jpg", "PNG": "png"}
PNG_MODES = {"1", "L", "LA", "I;16", "P", "RGB", "RGBA"}
_OBJECT_ADDRESS = re.compile(r" ?<[\w.]+ object at 0x[0-9a-fA-F]+>")


@dataclass
class Sample:
    key: str
    image: bytes
    ext: str
    caption: str
    labels_json: str


@dataclass
class Checked:
    """A sample that passed, as the writer needs it."""
    key: str
    members: bytes       # its tar members (headers, data, padding), ready to append to a shard
    record: bytes        # its line of the content hash
    label_fields: list[str]


@dataclass
class Refused:
    reason: str
    detail: str


def split_of(key: str, val_fraction: float) -> str:
    """Deterministic split by key hash, so a sample keeps its split when others are added."""
    bucket = int(hashlib.sha256(key.encode("utf-8")).hexdigest()[:8], 16) / 2**32  # in [0, 1)
    return "val" if bucket < val_fraction else "train"


# ---------------------------------------------------------------------------------------------
# labels and captions


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


# ---------------------------------------------------------------------------------------------
# images


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
        # Pillow names the buffer by its memory address, which differs between runs and processes
        message = _OBJECT_ADDRESS.sub("", str(exc))
        raise Reject("unreadable_image", f"{type(exc).__name__}: {message}") from None
    finally:
        ImageFile.LOAD_TRUNCATED_IMAGES = truncated_ok


def check_sample(candidate: Candidate, max_chars: int, image_optional: bool = False) -> Sample:
    """Read and validate one sample (cheap checks first); raises Reject. ``image_optional``: a row
    without an image is packed (its stored vector stands in for it)."""
    textual = image_optional and candidate.image_path is None and (candidate.problem or ("",))[0] == "missing_image"
    if candidate.problem and not textual:
        raise Reject(*candidate.problem)
    caption = _caption_of(candidate, max_chars)
    labels = _labels_of(candidate)
    image, ext = (b"", "") if textual else _read_image(candidate.image_path)
    return Sample(candidate.key, image, ext, caption, canonical_labels(labels))


# ---------------------------------------------------------------------------------------------
# encoding


def tar_members(sample: Sample) -> bytes:
    """The sample's members exactly as ``tarfile`` (PAX format) appends them: header, data, zero
    padding to the next 512-byte block; one sample's members next to each other (webdataset groups
    consecutive names by key)."""
    members = {sample.ext: sample.image, "txt": sample.caption.encode("utf-8"),
               "json": sample.labels_json.encode("utf-8")}
    members.pop("", None)  # a caption-and-vector sample has no image member
    out = bytearray()
    for ext in sorted(members):
        info = tarfile.TarInfo(f"{sample.key}.{ext}")
        info.size = len(members[ext])
        # fixed mtime/owner/mode: packing the same data twice gives byte-identical shards
        info.mtime, info.mode, info.uname, info.gname = 0, 0o444, "align", "align"
        out += info.tobuf(tarfile.PAX_FORMAT, "utf-8", "surrogateescape")
        out += members[ext] + tarfile.NUL * (-len(members[ext]) % tarfile.BLOCKSIZE)
    return bytes(out)


def content_record(sample: Sample) -> bytes:
    """The sample's line of the content hash: (key, sha256(image), caption, canonical labels)."""
    record = [sample.key, hashlib.sha256(sample.image).hexdigest(), sample.caption, sample.labels_json]
    return json.dumps(record, ensure_ascii=False).encode("utf-8") + b"\n"


def check_block(candidates: list[Candidate], max_chars: int, image_optional: bool) -> list[Checked | Refused]:
    """One outcome per candidate, in order: the unit of work a pack worker is handed."""
    outcomes: list[Checked | Refused] = []
    for candidate in candidates:
        try:
            sample = check_sample(candidate, max_chars, image_optional)
        except Reject as rej:
            outcomes.append(Refused(rej.reason, rej.detail))
            continue
        outcomes.append(Checked(sample.key, tar_members(sample), content_record(sample),
                                sorted(json.loads(sample.labels_json))))
    return outcomes
