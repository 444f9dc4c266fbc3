"""YAML text read strictly, for every YAML input (the app's cell, parts and calibration files; the lens files
vision reads itself): safe loading, duplicate keys refused, YAML 1.2 numbers, an alias-expansion limit,
and each error as a place (``line N, column M``) and a one-line problem.

It lives in vision, the lowest layer that reads files, so that the app and the lens loader share one copy
(vision may not import the app). Each caller turns :class:`YamlTextError` into its own typed error naming
the file.
"""

from __future__ import annotations

import re

import yaml

__all__ = ["MAX_YAML_VALUES", "YamlTextError", "load_yaml_text"]

#: the most values a YAML input may hold once its aliases are expanded (a YAML "billion laughs" is refused)
MAX_YAML_VALUES = 1_000_000

_YAML12_FLOAT = re.compile(r"^[-+]?[0-9][0-9_]*(?:\.[0-9_]*)?[eE][-+]?[0-9]+$")


class YamlTextError(ValueError):
    """YAML text that cannot be read: ``where`` (``line N, column M``, or empty) and ``problem`` (one line)."""

    def __init__(self, where: str, problem: str):
        self.where = where
        self.problem = problem
        super().__init__(f"{where}: {problem}" if where else problem)


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


class _AliasBomb(Exception):
    pass


def _compose_and_build(text: str):
    """Compose the node graph (libyaml when it can; a file it refuses is read again by the pure-Python
    loader, so every error message stays the same), refuse an alias bomb, then build the data."""
    for loader_class in (_FastUniqueKeyLoader, _UniqueKeyLoader):
        loader = loader_class(text)
        try:
            node = loader.get_single_node()
            if node is not None and _expanded_size(node, MAX_YAML_VALUES) > MAX_YAML_VALUES:
                raise _AliasBomb
            return loader.construct_document(node) if node is not None else None
        except (yaml.YAMLError, RecursionError):
            if loader_class is _UniqueKeyLoader:
                raise
        finally:
            loader.dispose()
    return None


def load_yaml_text(text: str):
    """The data of a YAML document (None for an empty one).

    Raises
    ------
    YamlTextError
        For a syntax error, a duplicated key, a key that is not a plain value (with the line and column of
        each), aliases that expand past :data:`MAX_YAML_VALUES` values or nesting too deep.
    """
    try:
        return _compose_and_build(text)
    except _AliasBomb:
        raise YamlTextError("", f"its aliases (*name) expand to more than {MAX_YAML_VALUES:,} values; "
                                "is it the right file?") from None
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        where = f"line {mark.line + 1}, column {mark.column + 1}" if mark else ""
        raise YamlTextError(where, f"YAML error: {exc.problem or exc.context or 'YAML syntax error'}") from None
    except yaml.YAMLError as exc:
        raise YamlTextError("", f"YAML error: {exc}") from None
    except RecursionError:
        raise YamlTextError("", "YAML nesting too deep") from None
