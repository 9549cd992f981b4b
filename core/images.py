"""Decoding one photo to 8-bit RGB.

Handles EXIF orientation, grey / palette / alpha / 16-bit / float / CMYK pixels, the first
frame of animated or multi-page files, and JPEG draft mode (DCT-domain downscaling, which
makes a 12-megapixel JPEG several times cheaper to decode when only a small copy is needed).
Every failure becomes a :class:`PhotoError` with a reason a person can read.
"""
from __future__ import annotations

import os
from pathlib import Path

import numpy as np
from PIL import Image, ImageOps, UnidentifiedImageError

IMAGE_SUFFIXES = {".jpg", ".jpeg", ".png", ".webp", ".bmp", ".tif", ".tiff", ".gif"}

_EXIF_ORIENTATION = 0x0112
_ORIENTATIONS_SWAPPING_SIDES = {5, 6, 7, 8}  # transpose / rotate 90 / transverse / rotate 270
_WHITE = (255, 255, 255)


class PhotoError(Exception):
    """A photo that cannot be decoded; ``str(err)`` is the human reason."""


def _open(path: os.PathLike | str) -> Image.Image:
    try:
        return Image.open(path)
    except FileNotFoundError:
        raise PhotoError(f"file not found: {path}") from None
    except IsADirectoryError:
        raise PhotoError(f"is a folder, not a photo: {path}") from None
    except PermissionError:
        raise PhotoError(f"no permission to read {path}") from None
    except UnidentifiedImageError:
        raise PhotoError(f"not a readable image (unknown or damaged format): {path}") from None
    except Image.DecompressionBombError as exc:
        raise PhotoError(f"too many pixels to decode safely: {exc}") from None
    except (OSError, ValueError, SyntaxError) as exc:
        raise PhotoError(f"cannot open image: {exc}") from None


def _orientation(img: Image.Image) -> int:
    try:
        return int(img.getexif().get(_EXIF_ORIENTATION, 1))
    except Exception:  # a damaged EXIF block must not make the whole photo unreadable
        return 1


def probe(path: os.PathLike | str) -> tuple[int, int]:
    """(width, height) as displayed, i.e. after EXIF orientation. Reads the header only,
    so a JPEG whose pixel data is cut short is only found by :func:`load_rgb`."""
    with _open(path) as img:
        width, height = img.size
        if _orientation(img) in _ORIENTATIONS_SWAPPING_SIDES:
            width, height = height, width
    if width <= 0 or height <= 0:
        raise PhotoError(f"image has no pixels ({width} x {height}): {path}")
    return width, height


def _on_white(img: Image.Image) -> Image.Image:
    rgba = img.convert("RGBA")
    background = Image.new("RGBA", rgba.size, _WHITE + (255,))
    return Image.alpha_composite(background, rgba).convert("RGB")


def _scaled_to_8bit(values: np.ndarray, full_scale: float) -> Image.Image:
    grey = np.clip(np.rint(values.astype(np.float64) * (255.0 / full_scale)), 0, 255)
    return Image.fromarray(grey.astype(np.uint8), "L").convert("RGB")


def _int_to_rgb(img: Image.Image) -> Image.Image:
    """16-bit ("I;16*") and 32-bit integer ("I") grey. Pillow decodes 16-bit PNG/TIFF to
    these modes; values are taken as 16-bit full scale (0..65535 -> 0..255). An "I" image
    whose values fall outside 0..65535 is stretched from its own min..max."""
    values = np.asarray(img)
    if img.mode == "I" and values.size and (values.min() < 0 or values.max() > 65535):
        low, high = float(values.min()), float(values.max())
        return _scaled_to_8bit(values - low, max(high - low, 1.0))
    return _scaled_to_8bit(values, 65535.0)


def _float_to_rgb(img: Image.Image) -> Image.Image:
    """32-bit float grey ("F"). Rule of thumb: 0..1 data is scaled by 255, 0..255 data is
    taken as is, anything else is stretched from its own min..max. NaN/inf become 0."""
    values = np.nan_to_num(np.asarray(img, dtype=np.float64), nan=0.0, posinf=0.0, neginf=0.0)
    low, high = (float(values.min()), float(values.max())) if values.size else (0.0, 0.0)
    if low >= 0.0 and high <= 1.0:
        return _scaled_to_8bit(values, 1.0)
    if low >= 0.0 and high <= 255.0:
        return _scaled_to_8bit(values, 255.0)
    return _scaled_to_8bit(values - low, max(high - low, 1e-12))


def to_rgb(img: Image.Image) -> Image.Image:
    """Any Pillow mode to 8-bit RGB; transparency is composited on white."""
    mode = img.mode
    if mode == "RGB":
        return img
    if mode in ("RGBA", "LA", "La", "RGBa", "PA") or (mode == "P" and "transparency" in img.info):
        return _on_white(img)
    if mode.startswith("I"):
        return _int_to_rgb(img)
    if mode == "F":
        return _float_to_rgb(img)
    # L, 1, P, CMYK (Pillow undoes Adobe's inverted CMYK), YCbCr, LAB, HSV, RGBX ...
    return img.convert("RGB")


def load_rgb(path: os.PathLike | str, min_side: int | None = None) -> Image.Image:
    """Decode ``path`` to an upright 8-bit RGB image.

    With ``min_side`` a JPEG is decoded at the smallest DCT scale (1/1, 1/2, 1/4, 1/8) whose
    shorter side is still >= ``min_side``; other formats decode at full size.
    """
    # Leaving the "with" closes the file (multi-frame files keep it open otherwise) but
    # keeps the decoded pixels.
    with _open(path) as source:
        try:
            if min_side and source.format == "JPEG":
                # draft() picks the largest scale keeping BOTH sides >= the request, so a
                # square min_side x min_side request keeps the short side >= min_side.
                source.draft("RGB", (int(min_side), int(min_side)))
            source.seek(0)  # first frame of a GIF / multi-page TIFF
            source.load()  # decode now so a truncated file fails here, not later
            ImageOps.exif_transpose(source, in_place=True)
            return to_rgb(source)
        except Image.DecompressionBombError as exc:
            raise PhotoError(f"too many pixels to decode safely: {exc}") from None
        except (OSError, ValueError, SyntaxError, EOFError) as exc:
            reason = str(exc) or type(exc).__name__
            if "truncated" in reason:
                raise PhotoError(f"image data is cut short (truncated file): {path}") from None
            raise PhotoError(f"cannot decode image {path}: {reason}") from None
