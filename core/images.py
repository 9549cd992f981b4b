"""Decoding one photo to 8-bit RGB.

Handles HEIC/HEIF (pillow-heif) and AVIF (when Pillow reads it), EXIF orientation, grey / palette / alpha / 16-bit / float / CMYK pixels, the first
frame of animated or multi-page files, and JPEG draft mode (DCT-domain downscaling, which
makes a 12-megapixel JPEG several times cheaper to decode when only a small copy is needed).
Only regular files are opened, and never so that the open can block. Every failure becomes a
:class:`PhotoError` with a reason a person can read and whether it is worth trying again.
"""
from __future__ import annotations

import contextlib
import os
import stat
from typing import BinaryIO, Iterator

import numpy as np
from PIL import Image, ImageOps, UnidentifiedImageError

IMAGE_SUFFIXES = {".jpg", ".jpeg", ".png", ".webp", ".bmp", ".tif", ".tiff", ".gif"}


def _register_phone_formats() -> None:
    """HEIC/HEIF (phone cameras) through the pillow-heif plugin, and AVIF when the installed Pillow
    reads it. pillow-heif applies the HEIF rotation/mirror boxes while decoding and reports EXIF
    orientation 1 afterwards (a phone's EXIF orientation is written into those boxes), so a HEIC photo
    comes out upright and is not turned twice; Pillow's own AVIF reader keeps the EXIF orientation,
    which `load_rgb` applies like a JPEG's."""
    try:
        from pillow_heif import register_heif_opener
    except ImportError:  # without the plugin, .heic files are skipped as unknown formats
        pass
    else:
        register_heif_opener()
        IMAGE_SUFFIXES.update({".heic", ".heif", ".hif"})
    try:
        from PIL import features
        if features.check("avif"):
            IMAGE_SUFFIXES.add(".avif")
    except Exception:  # an old Pillow without the "avif" feature name
        pass


_register_phone_formats()

_EXIF_ORIENTATION = 0x0112
_ORIENTATIONS_SWAPPING_SIDES = {5, 6, 7, 8}  # transpose / rotate 90 / transverse / rotate 270
_WHITE = (255, 255, 255)


class PhotoError(Exception):
    """A photo that cannot be decoded; ``str(err)`` is the human reason (it never names the
    file: callers show it beside the photo's relative path).

    ``retry`` says whether the failure may pass: False when the file is not a readable photo as it
    stands (unknown or damaged format, cut short, too many pixels, not a regular file), so a scan
    may remember it; True for a failure of the system rather than of the file (an I/O error, no
    permission, not enough memory, the file gone), which the next scan tries again."""

    def __init__(self, reason: str, retry: bool = False):
        super().__init__(reason)
        self.retry = retry


_FILE_KINDS = ((stat.S_ISDIR, "a folder"), (stat.S_ISFIFO, "a named pipe"), (stat.S_ISSOCK, "a socket"),
               (stat.S_ISCHR, "a character device"), (stat.S_ISBLK, "a block device"),
               (stat.S_ISLNK, "a symbolic link"))


def file_kind(mode: int) -> str:
    """What a non-regular file is, in words ("a named pipe", ...)."""
    return next((name for test, name in _FILE_KINDS if test(mode)), "not a regular file")


def not_regular(mode: int) -> str:
    return f"{file_kind(mode)}, not a regular file: only regular files are read"


def system_reason(exc: OSError) -> str:
    """A one-line reason for an operating-system error, without the file name."""
    if isinstance(exc, FileNotFoundError):
        return "file not found (moved or deleted meanwhile)"
    return f"cannot read the file: {exc.strerror or exc}"


def open_regular(path: os.PathLike | str) -> BinaryIO:
    """Open ``path`` for reading only if it is a regular file. The open itself cannot block (a
    named pipe or a device named like a photo would wait forever for a writer): O_NONBLOCK, and
    the type is checked on the opened descriptor, so a file swapped in after a check is caught too.
    O_NONBLOCK has no effect on reading a regular file."""
    flags = os.O_RDONLY | getattr(os, "O_NONBLOCK", 0) | getattr(os, "O_NOCTTY", 0) | getattr(os, "O_CLOEXEC", 0)
    try:
        fd = os.open(path, flags)
    except OSError as exc:
        raise PhotoError(system_reason(exc), retry=True) from None
    try:
        mode = os.fstat(fd).st_mode
    except OSError as exc:
        os.close(fd)
        raise PhotoError(system_reason(exc), retry=True) from None
    if not stat.S_ISREG(mode):
        os.close(fd)
        raise PhotoError(not_regular(mode))
    return os.fdopen(fd, "rb")


def _decode_failure(exc: BaseException) -> PhotoError | None:
    """PhotoError for what Pillow raised while opening or decoding; None if it is not ours to judge."""
    if isinstance(exc, Image.DecompressionBombError):
        return PhotoError(f"too many pixels to decode safely: {exc}")
    if isinstance(exc, UnidentifiedImageError):
        return PhotoError("not a readable image (unknown or damaged format)")
    if isinstance(exc, MemoryError):
        return PhotoError("not enough memory to decode it", retry=True)
    if isinstance(exc, OSError) and exc.errno is not None:
        # The operating system failed (EIO, EACCES, ENOMEM...), not the image format.
        return PhotoError(system_reason(exc), retry=True)
    if isinstance(exc, (OSError, ValueError, SyntaxError, EOFError)):
        # Pillow reports a damaged file as OSError without errno, SyntaxError, ValueError or EOFError.
        reason = str(exc) or type(exc).__name__
        if "truncated" in reason:
            return PhotoError("image data is cut short (truncated file)")
        return PhotoError(f"cannot decode the image: {reason}")
    return None


@contextlib.contextmanager
def _opened(source: os.PathLike | str | BinaryIO) -> Iterator[Image.Image]:
    """The image in ``source`` (a path, or a binary file the caller keeps open and closes)."""
    fh = source if hasattr(source, "read") else open_regular(source)
    try:
        try:
            img = Image.open(fh)
        except Exception as exc:
            failure = _decode_failure(exc)
            if failure is None:
                raise
            raise failure from None
        with img:
            yield img
    finally:
        if fh is not source:
            fh.close()


def _orientation(img: Image.Image) -> int:
    try:
        return int(img.getexif().get(_EXIF_ORIENTATION, 1))
    except Exception:  # a damaged EXIF block must not make the whole photo unreadable
        return 1


def probe(source: os.PathLike | str | BinaryIO) -> tuple[int, int]:
    """(width, height) as displayed, i.e. after EXIF orientation, of a path or an open binary file.
    Reads the header only, so a JPEG whose pixel data is cut short is only found by
    :func:`load_rgb`."""
    with _opened(source) as img:
        width, height = img.size
        if _orientation(img) in _ORIENTATIONS_SWAPPING_SIDES:
            width, height = height, width
    if width <= 0 or height <= 0:
        raise PhotoError(f"image has no pixels ({width} x {height})")
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
    # Leaving the "with" closes the file but keeps the decoded pixels.
    with _opened(path) as source:
        try:
            if min_side and source.format == "JPEG":
                # draft() picks the largest scale keeping BOTH sides >= the request, so a
                # square min_side x min_side request keeps the short side >= min_side.
                source.draft("RGB", (int(min_side), int(min_side)))
            source.seek(0)  # first frame of a GIF / multi-page TIFF
            source.load()  # decode now so a truncated file fails here, not later
            ImageOps.exif_transpose(source, in_place=True)
            return to_rgb(source)
        except Exception as exc:
            failure = _decode_failure(exc)
            if failure is None:
                raise
            raise failure from None
