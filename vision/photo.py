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


def _jpeg_size(data: bytes):
    i = 2
    while i + 9 < len(data):
        if data[i] != 0xFF:
            i += 1
            continue
        marker = data[i + 1]
        if marker in (0xC0, 0xC1, 0xC2, 0xC3, 0xC5, 0xC6, 0xC7, 0xC9, 0xCA, 0xCB, 0xCD, 0xCE, 0xCF):
            return int.from_bytes(data[i + 7:i + 9], "big"), int.from_bytes(data[i + 5:i + 7], "big")
        if marker in (0xD8, 0x01, 0xFF) or 0xD0 <= marker <= 0xD7:
            i += 1 if marker == 0xFF else 2
            continue
        i += 2 + int.from_bytes(data[i + 2:i + 4], "big")
    return None


def _tiff_size(data: bytes, fh=None):
    """Width and height of a TIFF's first image (baseline TIFF 6.0 header and IFD), or None. ``data`` is
    the file's start; an IFD beyond it is read from ``fh`` (the open file)."""
    order = "little" if data[:2] == b"II" else "big"
    if len(data) < 16 or int.from_bytes(data[2:4], order) != 42:
        return None
    ifd = int.from_bytes(data[4:8], order)
    if ifd + 2 > len(data) and fh is not None:
        fh.seek(ifd)
        data, ifd = b"\0" * 8 + fh.read(2 + 12 * 4096 + 4), 8
    if ifd + 2 > len(data):
        return None
    count = int.from_bytes(data[ifd:ifd + 2], order)
    size = {}
    for k in range(min(count, 4096)):
        e = ifd + 2 + 12 * k
        if e + 12 > len(data):
            break
        tag, kind = int.from_bytes(data[e:e + 2], order), int.from_bytes(data[e + 2:e + 4], order)
        if tag in (256, 257):
            size[tag] = int.from_bytes(data[e + 8:e + 10], order) if kind == 3 else int.from_bytes(data[e + 8:e + 12], order)
    return (size[256], size[257]) if len(size) == 2 else None


def _pnm_size(data: bytes):
    fields, i = [], 2
    while len(fields) < 2 and i < min(len(data), 4096):
        while i < len(data) and chr(data[i]).isspace():
            i += 1
        if i < len(data) and data[i:i + 1] == b"#":
            while i < len(data) and data[i] not in b"\r\n":
                i += 1
            continue
        j = i
        while j < len(data) and chr(data[j]).isdigit():
            j += 1
        if j == i:
            return None
        fields.append(int(data[i:j]))
        i = j
    return tuple(fields) if len(fields) == 2 else None


def _webp_size(data: bytes):
    chunk = data[12:16]
    if chunk == b"VP8 " and len(data) >= 30:
        return int.from_bytes(data[26:28], "little") & 0x3FFF, int.from_bytes(data[28:30], "little") & 0x3FFF
    if chunk == b"VP8L" and len(data) >= 25:
        bits = int.from_bytes(data[21:25], "little")
        return (bits & 0x3FFF) + 1, ((bits >> 14) & 0x3FFF) + 1
    if chunk == b"VP8X" and len(data) >= 30:
        return int.from_bytes(data[24:27], "little") + 1, int.from_bytes(data[27:30], "little") + 1
    return None


def _header_size(data: bytes, fh=None):
    """(width, height) from the header of a PNG, JPEG, TIFF, BMP, PNM or WebP file without decoding it;
    None for any other format (which is then refused: its size cannot be checked before decoding)."""
    if data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) >= 24:
        return int.from_bytes(data[16:20], "big"), int.from_bytes(data[20:24], "big")
    if data[:2] == b"\xff\xd8":
        return _jpeg_size(data)
    if data[:4] in (b"II*\x00", b"MM\x00*"):
        return _tiff_size(data, fh)
    if data[:2] == b"BM" and len(data) >= 26:
        return (abs(int.from_bytes(data[18:22], "little", signed=True)),
                abs(int.from_bytes(data[22:26], "little", signed=True)))
    if data[:1] == b"P" and data[1:2] in b"123456" and len(data) > 2:
        return _pnm_size(data)
    if data[:4] == b"RIFF" and data[8:12] == b"WEBP":
        return _webp_size(data)
    return None


def _whole_jpeg(p: Path, data: bytes) -> bytes:
    """The JPEG up to its end marker (bytes after it, as some cameras and tools append, are dropped).

    A JPEG cut short is refused, with or without an end marker pasted on: OpenCV's decoder fills
    the missing part grey and says nothing, so the scan data is walked to its end here (JPEG, ITU-T
    T.81 annex B: markers are 0xFF followed by a non-zero byte other than RSTn; 0xFF00 is stuffing).
    """
    i = 2
    while i + 2 <= len(data):
        if data[i] != 0xFF:
            break
        marker = data[i + 1]
        if marker == 0xFF:
            i += 1
            continue
        if marker == 0xD9:
            return data[: i + 2]
        if i + 4 > len(data):
            break
        length = int.from_bytes(data[i + 2:i + 4], "big")
        i += 2 + length
        if marker == 0xDA:                      # start of scan: entropy-coded data up to the next marker
            while True:
                j = data.find(b"\xff", i)
                if j < 0 or j + 1 >= len(data):
                    i = len(data)
                    break
                nxt = data[j + 1]
                if nxt == 0x00 or 0xD0 <= nxt <= 0xD7 or nxt == 0xFF:
                    i = j + (1 if nxt == 0xFF else 2)
                    continue
                i = j
                break
    raise PhotoError(f"{p}: the JPEG is truncated (its data ends early); copy or take the photo again")


def _whole_png(p: Path, data: bytes) -> bytes:
    """The PNG up to its IEND chunk (bytes after it are dropped, as for a JPEG).

    A PNG cut short or damaged is refused here, before decoding: libpng would print its own "PNG input
    buffer is incomplete" or "IDAT: CRC error" on the terminal, a second line beside gripsight's (PNG,
    ISO/IEC 15948 section 5.3: each chunk is a 4-byte length, a 4-byte type, the data and a CRC-32 of type
    and data; IEND is the last).
    """
    import zlib

    view = memoryview(data)
    i = 8
    while i + 12 <= len(data):
        length = int.from_bytes(data[i:i + 4], "big")
        end = i + 12 + length
        if end > len(data):
            break
        if zlib.crc32(view[i + 4:end - 4]) != int.from_bytes(data[end - 4:end], "big"):
            raise PhotoError(f"{p}: the PNG is damaged (its {data[i + 4:i + 8].decode('latin-1')} chunk fails its checksum); "
                             "copy or take the photo again")
        if data[i + 4:i + 8] == b"IEND":
            return data[:end]
        i = end
    raise PhotoError(f"{p}: the PNG is truncated (its data ends early); copy or take the photo again")


def _grey_filled_tail(image: np.ndarray) -> bool:
    """True when the bottom-right 16 x 16 block is exactly mid-grey: what libjpeg decodes for blocks
    missing from a JPEG cut short (zero coefficients), which no camera's noisy pixels give."""
    tail = image[-16:, -16:]
    return tail.size > 0 and bool(np.all(tail == 128))


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
        raise PhotoError(f"{p}: a link that leads nowhere or to itself, not a photo" if p.is_symlink() else f"{p}: no such photo")
    if p.is_dir():
        raise PhotoError(f"{p}: is a folder, not a photo")
    if not p.is_file():
        raise PhotoError(f"{p}: not a regular file (a pipe, device or socket); give a photo file")
    # the largest photo file worth reading: uncompressed 16-bit RGBA at the pixel limit, plus headers
    max_bytes = 8 * max_pixels + (1 << 20)
    try:
        if p.stat().st_size > max_bytes:
            raise PhotoError(f"{p}: {p.stat().st_size:,} bytes is more than a photo of at most "
                             f"{max_pixels:,} pixels can hold; resize the photo or raise the limit")
        with open(p, "rb") as fh:          # the header first: the pixels are counted before the rest is read
            data = fh.read(1 << 20)
            size = _header_size(data, fh) if data else None
            if size is not None and size[0] * size[1] <= max_pixels:
                fh.seek(len(data))
                data += fh.read()
    except OSError as exc:
        raise PhotoError(f"{p}: cannot be read ({exc.strerror or exc}); check its permissions") from None
    if not data:
        raise PhotoError(f"{p}: the file is empty (0 bytes)")
    if size is None:
        raise PhotoError(f"{p}: not a photo in a format gripsight reads (JPEG, PNG, TIFF, BMP, WebP, PNM), "
                         "or its header is damaged")
    if size[0] * size[1] > max_pixels:
        raise PhotoError(f"{p}: {size[0]}x{size[1]} px is more than the limit of {max_pixels:,} pixels; "
                         "resize the photo or raise the limit")
    if data[:2] == b"\xff\xd8":
        data = _whole_jpeg(p, data)
    elif data[:8] == b"\x89PNG\r\n\x1a\n":
        data = _whole_png(p, data)
    image = cv2.imdecode(np.frombuffer(data, np.uint8), cv2.IMREAD_UNCHANGED)
    if image is None:
        raise PhotoError(f"{p}: not a readable image (truncated, or not a photo at all)")
    if data[:2] == b"\xff\xd8" and _grey_filled_tail(image):
        raise PhotoError(f"{p}: the JPEG is truncated (its last blocks are missing); copy or take the photo again")
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
