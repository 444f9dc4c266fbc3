"""Text that cannot break a file: control characters and line breaks written as escapes.

Names and ids that reach a CSV field, a ``#`` comment line or HTML are passed through :func:`one_line`
(the writers quote or escape the rest: ``csv.writer`` quotes commas and quotes, ``html.escape`` the
markup), so a name can add no row, no column and no line. The cell file refuses such characters
outright (:func:`control_character_paths`), naming the key.
"""

from __future__ import annotations

import unicodedata

__all__ = ["one_line", "has_control", "control_character_paths"]

# Cc: C0/C1 controls (\n, \r, \t, \x00, \x85 ...); Zl, Zp: U+2028/2029, which str.splitlines breaks on
_BREAKING = ("Cc", "Zl", "Zp")


def has_control(text: str) -> bool:
    """True if ``text`` holds a control character or a line or paragraph separator."""
    return any(unicodedata.category(c) in _BREAKING for c in text)


def one_line(text) -> str:
    """``text`` with every control character and line break written as a visible escape (``\\n``,
    ``\\x00``, ``\\u2028``); other text unchanged."""
    text = str(text)
    if not has_control(text):
        return text
    out = []
    for c in text:
        if unicodedata.category(c) in _BREAKING:
            out.append({"\n": "\\n", "\r": "\\r", "\t": "\\t"}.get(c) or (f"\\x{ord(c):02x}" if ord(c) < 256 else f"\\u{ord(c):04x}"))
        else:
            out.append(c)
    return "".join(out)


def control_character_paths(data) -> list[tuple[tuple, str]]:
    """Every key path in parsed YAML whose key or text value holds a control character: (path, the
    offending text shown escaped). Iterative, and each container is visited once (YAML aliases can
    make a structure refer to itself)."""
    found = []
    seen: set[int] = set()
    stack: list[tuple[tuple, object]] = [((), data)]
    while stack:
        path, node = stack.pop()
        if isinstance(node, (dict, list)):
            if id(node) in seen:
                continue
            seen.add(id(node))
        if isinstance(node, dict):
            for key, value in node.items():
                shown = one_line(key) if isinstance(key, str) else key
                if isinstance(key, str) and has_control(key):
                    found.append((path + (shown,), shown))
                stack.append((path + (shown,), value))
        elif isinstance(node, list):
            stack.extend((path + (i,), value) for i, value in enumerate(node))
        elif isinstance(node, str) and has_control(node):
            found.append((path, one_line(node)))
    return sorted(found, key=lambda f: [str(k) for k in f[0]])
