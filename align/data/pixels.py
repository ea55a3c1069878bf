"""Image bytes to the pixels the tower sees: upright 8-bit RGB, 16-bit samples scaled, bombs refused.

One decoding rule for every reader (pack's check, the feature build, ``align.load``), so an image
that passed ``align pack`` decodes the same way wherever it is read.

16-bit samples: Pillow opens 16-bit grayscale PNG and TIFF as mode ``I;16``, and its own
``convert("RGB")`` clips every value above 255 (a typical 16-bit image turns almost all white).
Here they keep their high byte, ``v >> 8``: the rule Pillow itself applies when it opens 16-bit RGB
and RGBA PNG/TIFF as 8-bit ``RGB``/``RGBA``, so a 16-bit grayscale image and its 16-bit RGB copy
decode to the same pixels. (The rounded linear scale round(v * 255 / 65535) differs by at most one
level.) 32-bit integer and floating-point images have no agreed range; they are refused, not guessed.

Size: an image header claiming more pixels than Pillow's ``MAX_IMAGE_PIXELS`` is refused before
any pixel is decoded, with our own message instead of Pillow's warning on stderr.
"""
from __future__ import annotations

import io
import re
import warnings

import numpy as np
from PIL import Image, ImageOps


class ImageTooLarge(ValueError):
    """The header claims more pixels than decoding should be trusted with."""


class UnsupportedPixels(ValueError):
    """Samples whose 8-bit meaning is not defined (32-bit integer, floating point)."""


def pixel_limit() -> int | None:
    return Image.MAX_IMAGE_PIXELS  # read at call time: a program may raise it on purpose


def open_image(data: bytes) -> Image.Image:
    """Open (header only) with the size check; ImageTooLarge instead of Pillow's bomb warning/error."""
    limit = pixel_limit()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", Image.DecompressionBombWarning)  # checked below, in our words
        try:
            image = Image.open(io.BytesIO(data))
        except Image.DecompressionBombError as exc:  # over twice the limit: Pillow refuses to open it
            claimed = re.search(r"\((\d+) pixels\)", str(exc))
            pixels = f"{int(claimed.group(1)):,} pixels" if claimed else "a size"
            raise ImageTooLarge(f"its header claims {pixels}, over the limit of {limit:,}") from None
    if limit is not None and image.width * image.height > limit:
        size = f"{image.width} x {image.height} = {image.width * image.height:,} pixels"
        image.close()
        raise ImageTooLarge(f"its header claims {size}, over the limit of {limit:,}")
    return image


def _sixteen_bit_gray(image: Image.Image, source_format: str | None) -> bool:
    if image.mode.startswith("I;16"):
        return True
    # PNG has no 32-bit samples: an "I" image read from a PNG (older Pillow) is 16-bit grayscale
    return image.mode == "I" and source_format == "PNG"


def to_rgb8(image: Image.Image, source_format: str | None = None) -> Image.Image:
    """8-bit RGB of any image Pillow decodes; 16-bit grayscale scaled by ``v >> 8`` (see the module)."""
    if _sixteen_bit_gray(image, source_format):
        samples = np.asarray(image).astype(np.uint32)  # (H, W), 0..65535 in native byte order
        return Image.fromarray((samples >> 8).astype(np.uint8)).convert("RGB")
    if image.mode in ("I", "F") or image.mode.startswith("I;32") or image.mode.startswith("F;"):
        kind = "floating-point" if image.mode.startswith("F") else "32-bit integer"
        raise UnsupportedPixels(f"{kind} pixels (mode {image.mode}) have no agreed 8-bit scale")
    return image.convert("RGB")


def decode_image(data: bytes) -> Image.Image:
    """Decode packed bytes to an upright 8-bit RGB image (EXIF orientation applied, as a viewer shows it)."""
    with open_image(data) as image:
        source_format = image.format  # a transposed copy no longer knows it
        return to_rgb8(ImageOps.exif_transpose(image), source_format)
