"""Reading the YAML inputs (cell, parts and calibration files): safe loading, duplicate keys refused,
YAML 1.2 numbers, size and alias-expansion limits, every error one line with its YAML line.
"""

from __future__ import annotations

import os
import re
from pathlib import Path

import yaml

from gripsight.app.errors import CellFileError, Problem

__all__ = ["MAX_YAML_BYTES", "MAX_YAML_VALUES", "read_yaml"]

_YAML12_FLOAT = re.compile(r"^[-+]?[0-9][0-9_]*(?:\.[0-9_]*)?[eE][-+]?[0-9]+$")


class _UniqueKeyLoader(yaml.SafeLoader):
    """Safe loader that refuses duplicated keys (a silent overwrite would hide a typo)."""


def _construct_mapping(loader, node, deep=False):
    seen = set()
    for key_node, _ in node.value:
        key = loader.construct_object(key_node, deep=deep)
        try:
            duplicate = key in seen
        except TypeError:
            raise yaml.constructor.ConstructorError(
                None, None, "a key must be a plain value", key_node.start_mark) from None
        if duplicate:
            raise yaml.constructor.ConstructorError(
                None, None, f"duplicate key {key!r}", key_node.start_mark)
        seen.add(key)
    return loader.construct_mapping(node, deep)


class _FastUniqueKeyLoader(getattr(yaml, "CSafeLoader", yaml.SafeLoader)):
    """The same loader over libyaml's parser (30x faster: 1 ms for a cell file instead of 30). A file it
    refuses is read again by :class:`_UniqueKeyLoader`, so every error message stays the same."""


for _loader in (_UniqueKeyLoader, _FastUniqueKeyLoader):
    _loader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG, _construct_mapping)
    # YAML 1.2 numbers: PyYAML follows YAML 1.1, where `1e-9` (no dot) is a string; YAML 1.2's core schema
    # (yaml.org/spec/1.2.2, 10.3.2) reads it as a float, as users (and JSON) expect
    _loader.add_implicit_resolver("tag:yaml.org,2002:float", _YAML12_FLOAT, list("-+0123456789"))


#: the largest YAML input read (a cell file with every comment is a few kB; parts files of 10,000 parts ~1 MB)
MAX_YAML_BYTES = 4 * 1024 * 1024
#: the most values a YAML input may hold once its aliases are expanded (a YAML "billion laughs" is refused)
MAX_YAML_VALUES = 1_000_000


def _expanded_size(root, limit: int) -> int:
    """How many values the YAML node graph holds with every alias expanded (stops counting past ``limit``).

    Each node's expanded size is computed once (memoised, iteratively so deep nesting cannot overflow the
    stack): a graph of n nodes costs O(n) whatever its expansion.
    """
    size: dict[int, int] = {}
    visiting: set[int] = set()
    stack = [(root, False)]
    while stack:
        node, done = stack.pop()
        if id(node) in size:
            continue
        if not done and id(node) in visiting:       # a recursive alias: a value inside itself
            return limit + 1
        children = []
        if isinstance(node, yaml.SequenceNode):
            children = node.value
        elif isinstance(node, yaml.MappingNode):
            children = [n for pair in node.value for n in pair]
        if not done:
            visiting.add(id(node))
            stack.append((node, True))
            stack.extend((c, False) for c in children if id(c) not in size)
            continue
        size[id(node)] = min(limit + 1, 1 + sum(size.get(id(c), 0) for c in children))
    return size[id(root)]


def _load_yaml_text(text: str, name: str):
    """Compose the node graph (libyaml when it can; a file it refuses is read again by the pure-Python
    loader, so every error message stays the same), refuse an alias bomb, then build the data."""
    for loader_class in (_FastUniqueKeyLoader, _UniqueKeyLoader):
        loader = loader_class(text)
        try:
            node = loader.get_single_node()
            if node is not None and _expanded_size(node, MAX_YAML_VALUES) > MAX_YAML_VALUES:
                raise CellFileError(name, [Problem("", f"its aliases (*name) expand to more than {MAX_YAML_VALUES:,} "
                                                       "values; is it the right file?")])
            return loader.construct_document(node) if node is not None else None
        except (yaml.YAMLError, RecursionError):
            if loader_class is _UniqueKeyLoader:
                raise
        finally:
            loader.dispose()
    return None


def read_yaml(path: str | os.PathLike, what: str = "file", max_bytes: int = MAX_YAML_BYTES):
    """Read a YAML file with safe loading; return (data, raw bytes).

    Raises
    ------
    CellFileError
        For a missing file, a directory, an unreadable or non-UTF-8 file, or a YAML error (with its line).
    """
    path = Path(path)
    name = str(path)
    if not path.exists():
        raise CellFileError(name, [Problem("", f"no such {what}")])
    if path.is_dir():
        raise CellFileError(name, [Problem("", f"is a directory, not a {what}")])
    if not path.is_file():
        raise CellFileError(name, [Problem("", f"not a regular file (a pipe, device or socket); give a {what}")])
    try:
        size = path.stat().st_size
        if size > max_bytes:
            raise CellFileError(name, [Problem("", f"{size:,} bytes is too large for a {what} "
                                                   f"(at most {max_bytes:,}); is it the right file?")])
        raw = path.read_bytes()
    except OSError as exc:
        raise CellFileError(name, [Problem("", f"cannot be read ({exc.strerror})")]) from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError:
        raise CellFileError(name, [Problem("", "is not UTF-8 text (is it a YAML file?)")]) from None
    try:
        data = _load_yaml_text(text, name)
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        where = f"line {mark.line + 1}, column {mark.column + 1}" if mark else ""
        what_wrong = exc.problem or exc.context or "YAML syntax error"
        raise CellFileError(name, [Problem(where, f"YAML error: {what_wrong}")]) from None
    except yaml.YAMLError as exc:
        raise CellFileError(name, [Problem("", f"YAML error: {exc}")]) from None
    except RecursionError:
        raise CellFileError(name, [Problem("", "YAML nesting too deep")]) from None
    return data, raw
