"""Part classes by colour and shape: which classes share a colour, and which of them a blob is.

A class is a colour (CIELAB with a tolerance) and a shape (box or cylinder) with its size. Pixels can
only tell colours apart, so the classes are first put in colour groups: classes whose reference
colours lie closer (CIEDE2000) than half the smaller of their tolerances cannot be told apart by colour
and share a group (a cell of one class per colour has one group per class, and works as before).
Pixels are classified by group (:mod:`vision.pixelclass`); each blob of a group of several classes
then takes the class whose shape and size fit its outline:

* a class is a candidate when the blob's area, as the top face of a part of that class's height
  (scaled by k = C_z / (C_z - h) about the nadir), is a part's area of that class (0.45x to 1.6x);
* each candidate's top face (a rectangle of its footprint's proportions, or a circle) is fitted to the
  outer half of the outline (:func:`vision.topface.score_top_faces`); the fit holds when its size is
  within 15 % of the class's and the median residual is at most 0.4 mm;
* of the candidates whose fit holds, the one with the smallest median residual wins. A blob of a part's
  size that no class of its colour fits is ``unknown_shape``: it goes to the reject bin, never to the
  tray of a class it does not match.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np

from gripsight.vision.colour import delta_e_2000

__all__ = ["ColourGroup", "colour_groups", "shape_clashes", "SHAPE_TOO_CLOSE"]


@dataclass(frozen=True)
class _Colour:
    lab: tuple[float, float, float]
    tolerance: float


@dataclass(frozen=True)
class ColourGroup:
    """Classes that share a colour: the colour (the members' mean CIELAB), the largest tolerance of the
    members, and the members' names (in the cell's order)."""

    name: str
    lab: tuple[float, float, float]
    tolerance: float
    members: tuple[str, ...]


def colour_groups(classes: dict) -> dict[str, ColourGroup]:
    """Group the classes (name -> class with ``lab`` and ``tolerance``) by colour (see the module
    docstring). A group of one class is named after it; a group of several after its members."""
    key = tuple((name, tuple(float(v) for v in c.lab), float(c.tolerance)) for name, c in classes.items())
    return dict(_colour_groups(key))        # the same cell's classes on every photo: grouped once


@functools.lru_cache(maxsize=16)
def _colour_groups(key: tuple) -> dict[str, ColourGroup]:
    """:func:`colour_groups` of classes given as (name, lab, tolerance) tuples."""
    classes = {name: _Colour(lab, tolerance) for name, lab, tolerance in key}
    names = list(classes)
    parent = list(range(len(names)))

    def root(i):
        while parent[i] != i:
            parent[i] = parent[parent[i]]
            i = parent[i]
        return i

    labs = np.array([classes[n].lab for n in names], float).reshape(-1, 3)
    tolerances = np.array([classes[n].tolerance for n in names], float)
    close = delta_e_2000(labs[:, None, :], labs[None, :, :]) < 0.5 * np.minimum(tolerances[:, None], tolerances[None, :])
    for i, j in zip(*np.nonzero(np.triu(close, k=1))):      # every pair at once, then single linkage
        parent[root(int(j))] = root(int(i))
    members: dict[int, list[str]] = {}
    for i, name in enumerate(names):
        members.setdefault(root(i), []).append(name)
    groups = {}
    for group in members.values():
        name = group[0] if len(group) == 1 else "+".join(group)
        lab = np.mean([classes[n].lab for n in group], axis=0)
        groups[name] = ColourGroup(name, tuple(float(v) for v in lab), float(max(classes[n].tolerance for n in group)),
                                   tuple(group))
    return groups


SHAPE_TOO_CLOSE = 0.15      # footprint sides within this fraction: the top-face fit's size gate (15 %)


def _sides_mm(cls) -> list[float]:
    fp = list(cls.footprint_mm) * (2 if len(cls.footprint_mm) == 1 else 1)
    return sorted((float(v) for v in fp), reverse=True)


def shape_clashes(classes: dict, groups: dict[str, ColourGroup] | None = None) -> list[tuple[str, str]]:
    """Pairs of classes of one colour group that shape and size cannot tell apart either: the same shape
    (box or cylinder) and both footprint sides (longer with longer) within 15 % of each other, the
    tolerance of the top-face fit's size and of the size rule (:mod:`vision.parts`). A blob of either may
    take the other's class."""
    groups = colour_groups(classes) if groups is None else groups
    out = []
    for group in groups.values():
        for i, a in enumerate(group.members):
            for b in group.members[i + 1:]:
                ca, cb = classes[a], classes[b]
                if ca.shape == cb.shape and all(abs(x / y - 1.0) <= SHAPE_TOO_CLOSE
                                                for x, y in zip(_sides_mm(ca), _sides_mm(cb))):
                    out.append((a, b))
    return out
