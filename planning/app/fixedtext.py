"""Table rows of fixed-point numbers and short texts as one bytes object, built with numpy: for each
number exactly what Python's ``'%.Nf' % value`` writes, or None where that cannot be promised (the
caller then formats in Python). joints.csv's thousands of rows a photo are 3-5x faster this way.

Each column is a fixed-width slot of bytes (uint8), right-aligned, its unused bytes NUL; the row is
the slots and separators side by side, and the text is every byte but the NULs, row after row.

Exactness: ``'%.Nf'`` rounds the exact binary value of x at N decimals (ties to even). Here x 10^N is
rounded to the nearest integer in float64; the product's own rounding error is below 1.2e-7 while
|x 10^N| < 2^30, so the result is the same unless x 10^N lies within that of a half. A value within
1e-6 of a half is formatted by Python (about one in 250 000); a non-finite or larger one makes the
whole column fall back to Python.
"""

from __future__ import annotations

import numpy as np

__all__ = ["fixed_slots", "text_slots", "joined_rows"]

_SAFE_ABS = 2.0 ** 30
_TIE_MARGIN = 1e-6


def fixed_slots(values, decimals: int) -> np.ndarray | None:
    """Each value as ``'%.{decimals}f' % value`` writes it, in a slot (uint8, shape (N, width), NUL
    padded on the left); None if that cannot be promised (see the module)."""
    x = np.asarray(values, float)
    scaled = x * 10.0 ** decimals
    if not np.isfinite(scaled).all() or (np.abs(scaled) >= _SAFE_ABS).any():
        return None
    near_half = np.flatnonzero(np.abs(scaled - np.floor(scaled) - 0.5) < _TIE_MARGIN)
    n = np.abs(np.rint(scaled)).astype(np.int64)
    n_digits = max(len(str(int(n.max()))) if len(n) else 1, decimals + 1)
    # every digit of every value at once (most significant first); those left of a value's first
    # digit shown (its integer part's, at least one, and the decimals) stay NUL
    digits = (n[:, None] // 10 ** np.arange(n_digits - 1, -1, -1, dtype=np.int64)) % 10 + ord("0")
    int_digits = np.ones(len(n), np.int64)
    for k in range(1, n_digits - decimals):
        int_digits += n >= 10 ** (decimals + k)
    first = n_digits - decimals - int_digits                 # index of the first digit shown
    digits[np.arange(n_digits) < first[:, None]] = 0
    whole = n_digits - decimals
    out = np.zeros((len(n), 1 + n_digits + (1 if decimals else 0)), np.uint8)
    out[:, 1:1 + whole] = digits[:, :whole]
    if decimals:
        out[:, 1 + whole] = ord(".")
        out[:, 2 + whole:] = digits[:, whole:]
    neg = np.flatnonzero(np.signbit(x))              # '-' before the first digit (-0.0 too, as Python)
    out[neg, first[neg]] = ord("-")
    for i in near_half.tolist():                     # Python's own rounding, right-aligned in the slot
        text = np.frombuffer(("%.*f" % (decimals, x[i])).encode(), np.uint8)
        if len(text) > out.shape[1]:
            return None
        out[i] = 0
        out[i, out.shape[1] - len(text):] = text
    return out


def text_slots(texts: list[str]) -> np.ndarray | None:
    """Each text's UTF-8 bytes in a slot (uint8, shape (N, width), NUL padded); None if a text holds a
    NUL. One encoding per distinct text."""
    distinct = {t: t.encode("utf-8") for t in set(texts)}
    if any(b"\x00" in b for b in distinct.values()):
        return None
    width = max((len(b) for b in distinct.values()), default=0) or 1
    order = list(distinct)
    table = np.zeros((len(order), width), np.uint8)
    for i, t in enumerate(order):
        b = distinct[t]
        if b:
            table[i, width - len(b):] = np.frombuffer(b, np.uint8)
    index = {t: i for i, t in enumerate(order)}
    return table[np.fromiter((index[t] for t in texts), np.int64, len(texts))]


def joined_rows(slots: list[np.ndarray], sep: bytes = b",", end: bytes = b"\n") -> bytes:
    """The rows: the slots' texts joined by ``sep``, each row ended by ``end``."""
    n = len(slots[0])
    parts = []
    for i, s in enumerate(slots):
        parts.append(s)
        tail = end if i == len(slots) - 1 else sep
        parts.append(np.broadcast_to(np.frombuffer(tail, np.uint8), (n, len(tail))))
    flat = np.concatenate(parts, axis=1).ravel()
    return flat[flat != 0].tobytes()
