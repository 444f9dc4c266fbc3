"""Small charts drawn with OpenCV straight onto an image: panels with axes, ticks, grid, lines, markers,
text and a legend. The plan's pictures (joints.png, path.png) use it; a chart costs a few milliseconds
where a matplotlib figure cost half a second, and importing it costs nothing beyond OpenCV and numpy.

Colours are BGR tuples (OpenCV's order). Data coordinates map to pixels per panel; coordinates are drawn
with 4 bits of sub-pixel precision and anti-aliased lines.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import cv2
import numpy as np

__all__ = ["Chart", "Panel", "LegendEntry", "nice_ticks", "bgr", "png_bytes"]

_FONT = cv2.FONT_HERSHEY_SIMPLEX
_SHIFT = 4                      # sub-pixel bits for cv2 drawing
_ONE = 1 << _SHIFT
_INK = (40, 35, 30)
_GRID = (232, 232, 232)
_FRAME = (90, 90, 90)


def png_bytes(image: np.ndarray) -> bytes:
    """Lossless PNG, encoded fast: the "up" filter and deflate at its fastest level. An 8-bit BGR image
    is filtered here (numpy) and deflated by ISA-L (the ``isal`` package): on the demo overlays (1280 x
    960 photos) 4x faster than OpenCV's encoder at its fastest settings, the same size; elsewhere, or
    without ``isal``, OpenCV encodes it (zlib level 1, "up" filter, run-length matching: 30-40 %
    faster than its defaults and a third smaller). Measured on this machine."""
    if image.dtype == np.uint8 and image.ndim == 3 and image.shape[2] == 3 and image.size:
        try:
            from isal import isal_zlib
        except ImportError:
            pass
        else:
            return _png_rgb8(image, isal_zlib.compress)
    params = [cv2.IMWRITE_PNG_COMPRESSION, 1, cv2.IMWRITE_PNG_STRATEGY, cv2.IMWRITE_PNG_STRATEGY_RLE]
    if hasattr(cv2, "IMWRITE_PNG_FILTER"):           # OpenCV 4.10 and later
        params += [cv2.IMWRITE_PNG_FILTER, cv2.IMWRITE_PNG_FILTER_UP]
    ok, buf = cv2.imencode(".png", image, params)
    if not ok:
        raise ValueError("PNG encoding failed")
    return buf.tobytes()


def _png_rgb8(image_bgr: np.ndarray, deflate) -> bytes:
    """A PNG file of an 8-bit BGR image (PNG specification, ISO/IEC 15948: IHDR for 8-bit RGB, one
    IDAT of the zlib stream ``deflate(data, 1)`` gives, IEND), every row with filter 2 ("up": each byte
    less the byte above it, modulo 256; the row above the first is zeros)."""
    import struct
    import zlib

    h, w = image_bgr.shape[:2]
    rows = cv2.cvtColor(image_bgr, cv2.COLOR_BGR2RGB).reshape(h, 3 * w)
    data = np.empty((h, 3 * w + 1), np.uint8)
    data[:, 0] = 2
    data[0, 1:] = rows[0]
    np.subtract(rows[1:], rows[:-1], out=data[1:, 1:])

    def chunk(kind: bytes, body: bytes) -> bytes:
        return struct.pack(">I", len(body)) + kind + body + struct.pack(">I", zlib.crc32(body, zlib.crc32(kind)))

    header = struct.pack(">IIBBBBB", w, h, 8, 2, 0, 0, 0)        # 8 bits, RGB, deflate, adaptive, no interlace
    return b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", header) + chunk(b"IDAT", deflate(data, 1)) + chunk(b"IEND", b"")


def bgr(hex_rgb: str) -> tuple[int, int, int]:
    """``'#1b9e77'`` -> (B, G, R)."""
    h = hex_rgb.lstrip("#")
    return int(h[4:6], 16), int(h[2:4], 16), int(h[0:2], 16)


def nice_ticks(lo: float, hi: float, target: int = 7) -> np.ndarray:
    """Tick values on a 1-2-5 step inside [lo, hi], about ``target`` of them (common practice)."""
    if not (math.isfinite(lo) and math.isfinite(hi)) or hi <= lo:
        return np.array([lo])
    raw = (hi - lo) / max(target - 1, 1)
    mag = 10.0 ** math.floor(math.log10(raw))
    step = next(m * mag for m in (1, 2, 2.5, 5, 10) if m * mag >= raw * 0.999)
    first = math.ceil(lo / step - 1e-9) * step
    ticks = np.arange(first, hi + step * 1e-6, step)
    return np.round(ticks / step) * step


def _tick_label(v: float, step: float) -> str:
    decimals = max(0, -int(math.floor(math.log10(step)))) if step > 0 else 0
    if step > 0 and abs(step * 10 ** decimals - round(step * 10 ** decimals)) > 1e-6:
        decimals += 1                              # 2.5, 0.25 ...
    text = f"{v:.{decimals}f}"
    return "0" if text.strip("-0.") == "" else text


@dataclass(frozen=True)
class LegendEntry:
    label: str
    colour: tuple
    style: str = "line"          # line, dashed, thick, square, dot, cross, patch
    thickness: int = 2


def _text_size(text: str, scale: float, thickness: int = 1) -> tuple[int, int, int]:
    (w, h), base = cv2.getTextSize(text, _FONT, scale, thickness)
    return w, h, base


def _runs(finite: np.ndarray) -> list[tuple[int, int]]:
    """Start and end (exclusive) of each run of True."""
    edges = np.diff(np.concatenate([[0], finite.astype(np.int8), [0]]))
    return list(zip(np.flatnonzero(edges == 1).tolist(), np.flatnonzero(edges == -1).tolist()))


def _simplified(fixed: np.ndarray) -> np.ndarray:
    """A polyline (fixed-point pixels) less the points within a quarter pixel of the line through its
    neighbours (Douglas-Peucker, OpenCV's approxPolyDP): a curve of thousands of samples, a few per
    pixel, draws the same to the eye at a fraction of the cost (anti-aliased thick lines are drawn
    segment by segment)."""
    if len(fixed) <= 2:
        return fixed
    return cv2.approxPolyDP(fixed.reshape(-1, 1, 2), _ONE / 4, False).reshape(-1, 2)


class Chart:
    """One image holding one or more panels; ``png()`` encodes it."""

    def __init__(self, width_px: int, height_px: int, background=(255, 255, 255)):
        if len(set(background)) == 1:                # a grey (white): one memset
            self.image = np.full((height_px, width_px, 3), background[0], np.uint8)
        else:
            self.image = np.empty((height_px, width_px, 3), np.uint8)
            self.image[:] = background

    def panel(self, box_px: tuple[int, int, int, int], xlim, ylim, equal: bool = False,
              invert_x: bool = False) -> "Panel":
        """A panel in the pixel box (left, top, right, bottom) showing ``xlim`` x ``ylim``; with ``equal``
        one data unit is as long on both axes (the limits grow to fill the box)."""
        return Panel(self, box_px, xlim, ylim, equal, invert_x)

    def text(self, xy_px, text: str, scale: float = 0.5, colour=_INK, thickness: int = 1, align: str = "left") -> None:
        """Text with its baseline at ``xy_px``; ``align`` left, centre or right."""
        w, _, _ = _text_size(text, scale, thickness)
        x = xy_px[0] - (w // 2 if align == "centre" else w if align == "right" else 0)
        cv2.putText(self.image, text, (int(x), int(xy_px[1])), _FONT, scale, colour, thickness, cv2.LINE_AA)

    def vertical_text(self, centre_px, text: str, scale: float = 0.5, colour=_INK) -> None:
        """Text turned a quarter left (reads bottom to top), centred at ``centre_px``."""
        w, h, base = _text_size(text, scale)
        tile = np.full((h + base + 4, w + 4, 3), 255, np.uint8)
        cv2.putText(tile, text, (2, h + 2), _FONT, scale, colour, 1, cv2.LINE_AA)
        tile = cv2.rotate(tile, cv2.ROTATE_90_COUNTERCLOCKWISE)
        th, tw = tile.shape[:2]
        x0, y0 = int(centre_px[0] - tw / 2), int(centre_px[1] - th / 2)
        x0, y0 = max(x0, 0), max(y0, 0)
        region = self.image[y0:y0 + th, x0:x0 + tw]
        np.minimum(region, tile[:region.shape[0], :region.shape[1]], out=region)

    def png(self) -> bytes:
        return png_bytes(self.image)


class Panel:
    """Axes in a pixel box of a :class:`Chart`: data (x, y) -> pixel (u, v) with y up."""

    def __init__(self, chart: Chart, box_px, xlim, ylim, equal: bool, invert_x: bool):
        self.chart, self.image = chart, chart.image
        self.left, self.top, self.right, self.bottom = box_px
        x0, x1 = float(xlim[0]), float(xlim[1])
        y0, y1 = float(ylim[0]), float(ylim[1])
        if x1 <= x0:
            x0, x1 = x0 - 1, x0 + 1
        if y1 <= y0:
            y0, y1 = y0 - 1, y0 + 1
        w, h = self.right - self.left, self.bottom - self.top
        if equal:                                    # one scale for both axes; grow the short range
            scale = min(w / (x1 - x0), h / (y1 - y0))
            cx, cy = (x0 + x1) / 2, (y0 + y1) / 2
            x0, x1 = cx - w / scale / 2, cx + w / scale / 2
            y0, y1 = cy - h / scale / 2, cy + h / scale / 2
        self.xlim, self.ylim, self.invert_x = (x0, x1), (y0, y1), invert_x
        self._sx = w / (x1 - x0) * (-1 if invert_x else 1)
        self._ox = self.right if invert_x else self.left
        self._sy = -h / (y1 - y0)

    # ---------------------------------------------------------------- coordinates
    def to_px(self, x, y) -> np.ndarray:
        """Pixel coordinates, shape (N, 2) float64."""
        x = np.asarray(x, float)
        y = np.asarray(y, float)
        lo_x = self.xlim[0]
        return np.column_stack([self._ox + (x - lo_x) * self._sx, self.bottom + (y - self.ylim[0]) * self._sy])

    def _fixed(self, uv: np.ndarray) -> np.ndarray:
        return np.round(uv * _ONE).astype(np.int32)

    def _clip(self):
        """A view of the image inside the box (drawing into it never spills over the frame)."""
        return self.image[self.top:self.bottom + 1, self.left:self.right + 1]

    def _offset(self, uv: np.ndarray) -> np.ndarray:
        return uv - [self.left, self.top]

    # ---------------------------------------------------------------- drawing
    def line(self, x, y, colour, thickness: int = 2, dashed: bool = False) -> None:
        """A polyline through the points; NaN breaks it."""
        uv = self.to_px(x, y)
        ok = np.isfinite(uv).all(axis=1)
        clip = self._clip()
        for a, b in _runs(ok):
            pts = self._offset(uv[a:b])
            if len(pts) == 1:
                pts = np.vstack([pts, pts])
            if dashed:
                self._dashed(clip, pts, colour, thickness)
            else:
                cv2.polylines(clip, [_simplified(self._fixed(pts))], False, colour, thickness, cv2.LINE_AA, _SHIFT)

    def _dashed(self, clip, pts: np.ndarray, colour, thickness: int, dash_px: float = 7.0) -> None:
        keep = np.concatenate([[True], np.any(np.abs(np.diff(pts, axis=0)) > 0.01, axis=1)])
        pts = pts[keep]
        seg = np.diff(pts, axis=0)
        length = np.hypot(seg[:, 0], seg[:, 1])
        s = np.concatenate([[0.0], np.cumsum(length)])
        if s[-1] <= 0:
            return
        cuts = np.arange(0.0, s[-1], dash_px)
        ends = np.minimum(cuts + dash_px * 0.6, s[-1])
        a = np.column_stack([np.interp(cuts, s, pts[:, 0]), np.interp(cuts, s, pts[:, 1])])
        b = np.column_stack([np.interp(ends, s, pts[:, 0]), np.interp(ends, s, pts[:, 1])])
        lines = self._fixed(np.stack([a, b], axis=1))
        cv2.polylines(clip, list(lines), False, colour, thickness, cv2.LINE_AA, _SHIFT)

    def step(self, x, y, colour, thickness: int = 1, dashed: bool = False) -> None:
        """A step line holding each value until the next x (``where='post'``), drawn from its change points."""
        x = np.asarray(x, float)
        y = np.asarray(y, float)
        if len(x) == 0:
            return
        change = np.flatnonzero(np.diff(y) != 0) + 1
        xs = np.concatenate([[x[0]], np.repeat(x[change], 2), [x[-1]]])
        ys = np.concatenate([np.repeat(y[np.concatenate([[0], change])], 2)])
        self.line(xs, ys, colour, thickness, dashed)

    def vspan(self, x0: float, x1: float, colour) -> None:
        """Shade the panel's full height between x0 and x1."""
        uv = self.to_px([x0, x1], [self.ylim[0], self.ylim[0]])
        a, b = sorted(np.clip(uv[:, 0], self.left, self.right))
        cv2.rectangle(self.image, (int(round(a)), self.top), (int(round(b)), self.bottom), colour, -1)

    def vline(self, x, colour, thickness: int = 1) -> None:
        """Vertical lines at every x (one call)."""
        u = self.to_px(np.atleast_1d(x), np.zeros(np.size(x)))[:, 0] - self.left
        h = self.bottom - self.top
        segs = np.stack([np.column_stack([u, np.zeros_like(u)]), np.column_stack([u, np.full_like(u, h)])], axis=1)
        cv2.polylines(self._clip(), list(self._fixed(segs)), False, colour, thickness, cv2.LINE_AA, _SHIFT)

    def hline(self, y: float, colour, thickness: int = 1, dashed: bool = False) -> None:
        self.line(list(self.xlim), [y, y], colour, thickness, dashed)

    def markers(self, x, y, colour, kind: str = "dot", size_px: int = 8, thickness: int = 2) -> None:
        """Markers at the points: dot (filled circle), square (outline), cross (x), plus (+)."""
        uv = self._offset(self.to_px(np.atleast_1d(x), np.atleast_1d(y)))
        clip = self._clip()
        r = size_px / 2
        for u, v in uv:
            c = self._fixed(np.array([u, v]))
            if kind == "dot":
                cv2.circle(clip, tuple(c), int(r * _ONE), colour, -1, cv2.LINE_AA, _SHIFT)
            elif kind == "square":
                p = self._fixed(np.array([[u - r, v - r], [u + r, v - r], [u + r, v + r], [u - r, v + r]]))
                cv2.polylines(clip, [p], True, colour, thickness, cv2.LINE_AA, _SHIFT)
            else:
                d = np.array([[-r, -r, r, r], [-r, r, r, -r]]) if kind == "cross" else np.array(
                    [[-r, 0, r, 0], [0, -r, 0, r]])
                segs = [self._fixed(np.array([[u + a, v + b], [u + c2, v + d2]])) for a, b, c2, d2 in d]
                cv2.polylines(clip, segs, False, colour, thickness, cv2.LINE_AA, _SHIFT)

    def fill(self, x, y, colour, alpha: float = 0.3) -> None:
        """A filled polygon, blended with what is under it."""
        clip = self._clip()
        pts = self._fixed(self._offset(self.to_px(x, y)))
        layer = clip.copy()
        cv2.fillPoly(layer, [pts], colour, cv2.LINE_AA, _SHIFT)
        cv2.addWeighted(layer, alpha, clip, 1 - alpha, 0, dst=clip)

    def text(self, x: float, y: float, text: str, colour=_INK, offset_px=(5, -5), scale: float = 0.42,
             align: str = "left") -> None:
        """Text beside a data point (offset in pixels, v down)."""
        u, v = self.to_px([x], [y])[0]
        if not (np.isfinite(u) and np.isfinite(v)):
            return
        self.chart.text((u + offset_px[0], v + offset_px[1]), text, scale, colour, align=align)

    # ---------------------------------------------------------------- furniture
    def _ticks(self):
        xt = nice_ticks(*sorted(self.xlim))
        yt = nice_ticks(*self.ylim)
        xu = self.to_px(xt, np.full(len(xt), self.ylim[0]))[:, 0]
        yv = self.to_px(np.full(len(yt), self.xlim[0]), yt)[:, 1]
        return xt, yt, xu, yv

    def grid(self) -> None:
        """Light grid lines at the ticks; call before drawing the data."""
        _, _, xu, yv = self._ticks()
        for u in xu:
            cv2.line(self.image, (int(round(u)), self.top), (int(round(u)), self.bottom), _GRID, 1)
        for v in yv:
            cv2.line(self.image, (self.left, int(round(v))), (self.right, int(round(v))), _GRID, 1)

    def axes(self, xlabel: str = "", ylabel: str = "", title: str = "", x_ticks: bool = True) -> None:
        """Frame, ticks with their labels, axis labels and title; call after drawing the data."""
        img = self.image
        xt, yt, xu, yv = self._ticks()
        xstep = float(xt[1] - xt[0]) if len(xt) > 1 else 1.0
        ystep = float(yt[1] - yt[0]) if len(yt) > 1 else 1.0
        for u, value in zip(xu, xt):
            ui = int(round(u))
            cv2.line(img, (ui, self.bottom), (ui, self.bottom + 5), _FRAME, 1)
            if x_ticks:
                self.chart.text((ui, self.bottom + 20), _tick_label(value, xstep), 0.42, align="centre")
        widest = 0
        for v, value in zip(yv, yt):
            vi = int(round(v))
            cv2.line(img, (self.left - 5, vi), (self.left, vi), _FRAME, 1)
            label = _tick_label(value, ystep)
            widest = max(widest, _text_size(label, 0.42)[0])
            self.chart.text((self.left - 9, vi + 5), label, 0.42, align="right")
        if xlabel:
            self.chart.text(((self.left + self.right) // 2, self.bottom + 42), xlabel, 0.48, align="centre")
        if ylabel:
            self.chart.vertical_text((self.left - widest - 24, (self.top + self.bottom) // 2), ylabel, 0.48)
        if title:
            self.chart.text(((self.left + self.right) // 2, self.top - 10), title, 0.55, align="centre")
        self.frame()

    def frame(self) -> None:
        cv2.rectangle(self.image, (self.left, self.top), (self.right, self.bottom), _FRAME, 1)

    def legend(self, entries: list[LegendEntry], corner: str = "upper right", scale: float = 0.42) -> None:
        """A boxed legend in a corner of the panel: a sample of each entry's style and its label."""
        if not entries:
            return
        sizes = [_text_size(e.label, scale) for e in entries]
        row_h, sample_w, pad = max(s[1] for s in sizes) + 9, 28, 8
        w = sample_w + 3 * pad + max(s[0] for s in sizes)
        h = row_h * len(entries) + pad
        x0 = self.right - w - 8 if "right" in corner else self.left + 8
        y0 = self.top + 8 if "upper" in corner else self.bottom - h - 8
        img = self.image
        cv2.rectangle(img, (x0, y0), (x0 + w, y0 + h), (255, 255, 255), -1)
        cv2.rectangle(img, (x0, y0), (x0 + w, y0 + h), (200, 200, 200), 1)
        for i, e in enumerate(entries):
            cy = y0 + pad // 2 + row_h * i + row_h // 2
            a, b = (x0 + pad, cy), (x0 + pad + sample_w, cy)
            if e.style in ("line", "thick"):
                cv2.line(img, a, b, e.colour, e.thickness, cv2.LINE_AA)
            elif e.style == "dashed":
                for k in range(0, sample_w, 7):
                    cv2.line(img, (a[0] + k, cy), (a[0] + min(k + 4, sample_w), cy), e.colour, e.thickness, cv2.LINE_AA)
            elif e.style == "patch":
                cv2.rectangle(img, (a[0], cy - 6), (b[0], cy + 6), e.colour, -1)
            else:
                mid = (x0 + pad + sample_w // 2, cy)
                if e.style == "dot":
                    cv2.circle(img, mid, 5, e.colour, -1, cv2.LINE_AA)
                elif e.style == "square":
                    cv2.rectangle(img, (mid[0] - 6, cy - 6), (mid[0] + 6, cy + 6), e.colour, 2)
                elif e.style == "cross":
                    cv2.line(img, (mid[0] - 5, cy - 5), (mid[0] + 5, cy + 5), e.colour, 2, cv2.LINE_AA)
                    cv2.line(img, (mid[0] - 5, cy + 5), (mid[0] + 5, cy - 5), e.colour, 2, cv2.LINE_AA)
            cv2.putText(img, e.label, (x0 + 2 * pad + sample_w, cy + sizes[i][1] // 2), _FONT, scale, _INK, 1,
                        cv2.LINE_AA)
