"""Small pictures of gallery and evaluation images: one way to shrink an image, for the report, the
service's search view and ``align query --html``."""
from __future__ import annotations

import base64
import io
from pathlib import Path

from ..data.pixels import decode_image
from ..data.shards import iter_image_bytes
from ..errors import AlignError

THUMBNAIL_PX = 112
JPEG_QUALITY = 85


def shrink_to_jpeg(raw: bytes, side: int = THUMBNAIL_PX) -> bytes:
    """JPEG bytes of ``raw`` decoded by the pack's rule (EXIF upright, 16-bit scaled, bombs refused) and
    shrunk to fit a ``side`` x ``side`` box, aspect kept (never enlarged).

    ValueError when the bytes do not decode (Pillow raises many kinds for damaged data; they are
    folded into one so a caller decides once what a broken picture means).
    """
    try:
        image = decode_image(raw)
        image.thumbnail((side, side))
        buffer = io.BytesIO()
        image.save(buffer, format="JPEG", quality=JPEG_QUALITY)
    except Exception as exc:  # noqa: BLE001 - see the docstring
        raise ValueError(f"the image does not decode ({type(exc).__name__}: {str(exc)[:120]})") from None
    return buffer.getvalue()


def jpeg_uri(jpeg: bytes) -> str:
    return "data:image/jpeg;base64," + base64.b64encode(jpeg).decode("ascii")


def thumbnails(shards_dir: str | Path, split: str, keys: set[str], side: int = THUMBNAIL_PX) -> dict[str, str]:
    """key -> a ``data:image/jpeg;base64,...`` URI for each wanted key found in the split.

    One pass over the split's shards (a tar read; only the wanted images are decoded). A missing
    folder or a key that fails to decode is left out: the page then shows the key without a picture.
    """
    found: dict[str, str] = {}
    if not keys:
        return found
    try:
        for key, raw, _ in iter_image_bytes(shards_dir, split):
            if key not in keys:
                continue
            try:
                found[key] = jpeg_uri(shrink_to_jpeg(raw, side))
            except ValueError:  # the page shows the key alone
                continue
            if len(found) == len(keys):
                break
    except (AlignError, OSError):  # the shards moved or are gone: a report still renders, without pictures
        return found
    return found
