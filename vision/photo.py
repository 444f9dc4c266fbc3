"""Reading photos safely: clear one-line errors for files that are not usable photos.

Accepts 8- and 16-bit, grey, BGR and BGRA images in any format OpenCV reads; returns 8-bit BGR.
Paths with spaces or non-ASCII characters work (the bytes are read by Python, decoded by OpenCV).
"""

from __future__ import annotations

from pathlib import Path

import cv2
import numpy as np

from gripsight.vision.errors import PhotoError

__all__ = ["PhotoError", "read_photo", "DEFAULT_MAX_PIXELS"]

DEFAULT_MAX_PIXELS = 50_000_000        # overridden by GRIPSIGHT_MAX_PIXELS (the CLI's --max-pixels sets it)


def _max_pixels_default() -> int:
    import os

    value = os.environ.get("GRIPSIGHT_MAX_PIXELS", "")
    return int(value) if value.isdigit() and int(value) > 0 else DEFAULT_MAX_PIXELS


def _header_size(data: bytes):
    """(width, height) from a PNG or JPEG header without decoding, or None."""
    if data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) >= 24:
        return int.from_bytes(data[16:20], "big"), int.from_bytes(data[20:24], "big")
    if data[:2] == b"\xff\xd8":
        i = 2
        while i + 9 < len(data):
            if data[i] != 0xFF:
                i += 1
                continue
            marker = data[i + 1]
            if marker in (0xC0, 0xC1, 0xC2, 0xC3, 0xC5, 0xC6, 0xC7, 0xC9, 0xCA, 0xCB, 0xCD, 0xCE, 0xCF):
                return int.from_bytes(data[i + 7:i + 9], "big"), int.from_bytes(data[i + 5:i + 7], "big")
            if marker in (0xD8, 0x01) or 0xD0 <= marker <= 0xD7:
                i += 2
                continue
            i += 2 + int.from_bytes(data[i + 2:i + 4], "big")
    return None


def read_photo(path, max_pixels: int | None = None) -> np.ndarray:
    """The photo as 8-bit BGR, shape (H, W, 3).

    Raises
    ------
    PhotoError
        Missing, unreadable, empty, not an image, too many pixels, or too small to hold markers.
    """
    max_pixels = max_pixels or _max_pixels_default()
    p = Path(path)
    if not p.exists():
        raise PhotoError(f"{p}: no such photo")
    if p.is_dir():
        raise PhotoError(f"{p}: is a folder, not a photo")
    try:
        data = p.read_bytes()
    except OSError as exc:
        raise PhotoError(f"{p}: cannot be read ({exc.strerror or exc}); check its permissions") from None
    if not data:
        raise PhotoError(f"{p}: the file is empty (0 bytes)")
    size = _header_size(data)
    if size is not None and size[0] * size[1] > max_pixels:
        raise PhotoError(f"{p}: {size[0]}x{size[1]} px is more than the limit of {max_pixels:,} pixels; "
                         "resize the photo or raise the limit")
    if data[:2] == b"\xff\xd8" and b"\xff\xd9" not in data[-64:]:
        raise PhotoError(f"{p}: the JPEG is truncated (no end marker); copy or take the photo again")
    image = cv2.imdecode(np.frombuffer(data, np.uint8), cv2.IMREAD_UNCHANGED)
    if image is None:
        raise PhotoError(f"{p}: not a readable image (truncated, or not a photo at all)")
    if image.shape[0] * image.shape[1] > max_pixels:
        raise PhotoError(f"{p}: {image.shape[1]}x{image.shape[0]} px is more than the limit of {max_pixels:,} pixels")
    if image.dtype == np.uint16:
        image = (image / 257.0 + 0.5).astype(np.uint8)
    elif image.dtype != np.uint8:
        image = cv2.normalize(image, None, 0, 255, cv2.NORM_MINMAX).astype(np.uint8)
    if image.ndim == 2:
        image = cv2.cvtColor(image, cv2.COLOR_GRAY2BGR)
    elif image.shape[2] == 4:
        image = cv2.cvtColor(image, cv2.COLOR_BGRA2BGR)
    elif image.shape[2] == 1:
        image = cv2.cvtColor(image[..., 0], cv2.COLOR_GRAY2BGR)
    if min(image.shape[:2]) < 32:
        raise PhotoError(f"{p}: {image.shape[1]}x{image.shape[0]} px is too small to show markers")
    return np.ascontiguousarray(image)
