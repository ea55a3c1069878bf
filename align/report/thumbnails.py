"""Small inline pictures of evaluation images, read from the packed shards by key."""
from __future__ import annotations

import base64
import io
from pathlib import Path

from PIL import Image

from ..data.shards import iter_image_bytes
from ..errors import AlignError

THUMBNAIL_PX = 112


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
                image = Image.open(io.BytesIO(raw)).convert("RGB")
            except Exception:  # PIL raises many kinds for damaged data; the page shows the key alone
                continue
            image.thumbnail((side, side))
            buffer = io.BytesIO()
            image.save(buffer, format="JPEG", quality=85)
            found[key] = "data:image/jpeg;base64," + base64.b64encode(buffer.getvalue()).decode("ascii")
            if len(found) == len(keys):
                break
    except (AlignError, OSError):  # the shards moved or are gone: a report still renders, without pictures
        return found
    return found
