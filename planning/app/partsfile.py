"""The parts file (``--parts parts.yaml``): plan without a photo.

Parts file (YAML): a list, or a mapping with a ``parts:`` list, of entries::

    - {id: p1, class: red, x_mm: 210, y_mm: -35, yaw_deg: 10}
    - {class: blue, x_mm: 180, y_mm: 60, width_mm: 22, length_mm: 22}
    - {class: purple, x_mm: 250, y_mm: 0, height_mm: 20, width_mm: 20}   # unknown class: reject tray

Missing sizes come from the class in the cell file; a class the cell does not know goes to the
``reject`` bin (and must give its height and width).
"""

from __future__ import annotations

import os

from pydantic import BaseModel, ConfigDict, Field, ValidationError

from gripsight.app.cellfile import Number, PositiveMm, _pydantic_problems, read_yaml
from gripsight.app.errors import CellFileError, Problem
from gripsight.planning.targets import PartTarget

__all__ = ["load_parts_file", "parse_parts", "MAX_PARTS_PER_PLAN"]

#: the most parts one plan takes: ordering and checks stay under a few seconds and ~100 MB up to here
MAX_PARTS_PER_PLAN = 1000
#: a parts file of MAX_PARTS_PER_PLAN parts is ~100 kB; anything past 1 MB is not a parts file
MAX_PARTS_FILE_BYTES = 1024 * 1024

Positive = PositiveMm


class _Entry(BaseModel):
    model_config = ConfigDict(extra="forbid", strict=True, allow_inf_nan=False, populate_by_name=True)

    id: str | int | None = None      # `id: 1` is read as the part id "1"
    class_name: str = Field(alias="class", min_length=1)
    x_mm: Number
    y_mm: Number
    yaw_deg: Number = 0.0
    width_mm: Positive | None = None
    length_mm: Positive | None = None
    height_mm: Positive | None = None


def parse_parts(data, cell, source: str = "<parts>") -> list[PartTarget]:
    """Validate parts-file data against a cell; every problem is reported with its key path.

    Raises
    ------
    CellFileError
        Listing every problem (type errors, NaN, duplicate ids, unknown class without sizes).
    """
    if isinstance(data, dict) and set(data) == {"parts"}:
        data, prefix = data["parts"], "parts"
    else:
        prefix = "parts" if isinstance(data, dict) else ""
    if data is None:
        data = []
    if not isinstance(data, list):
        raise CellFileError(source, [Problem(prefix, "must be a list of parts, e.g. - {class: red, x_mm: 200, y_mm: 0}")])
    if len(data) > MAX_PARTS_PER_PLAN:
        raise CellFileError(source, [Problem(prefix, f"{len(data):,} parts, more than the {MAX_PARTS_PER_PLAN:,} one plan "
                                                     "takes; split them into several files")])
    problems: list[Problem] = []
    entries: list[tuple[int, _Entry]] = []
    for i, item in enumerate(data):
        where = f"{prefix}.{i}" if prefix else str(i)
        if not isinstance(item, dict):
            problems.append(Problem(where, "must be a mapping such as {class: red, x_mm: 200, y_mm: 0}"))
            continue
        try:
            entries.append((i, _Entry.model_validate(item)))
        except ValidationError as exc:
            for p in _pydantic_problems(exc):
                loc = p.where.replace("class_name", "class")
                problems.append(Problem(f"{where}.{loc}", p.message))
    seen: dict[str, int] = {}
    targets = []
    for i, e in entries:
        where = f"{prefix}.{i}" if prefix else str(i)
        part_id = str(e.id) if e.id is not None else f"p{i + 1}"
        if part_id in seen:
            problems.append(Problem(f"{where}.id", f"duplicate id '{part_id}' (also entry {seen[part_id]})"))
            continue
        seen[part_id] = i
        cls = cell.parts.get(e.class_name)
        if cls is None:
            missing = [k for k in ("height_mm", "width_mm") if getattr(e, k) is None]
            for key in missing:
                problems.append(Problem(f"{where}.{key}", f"required for class '{e.class_name}', which the cell does not know"))
            if missing:
                continue
            width = e.width_mm
            length = e.length_mm if e.length_mm is not None else width
            targets.append(PartTarget(part_id, e.class_name, (e.x_mm, e.y_mm), e.height_mm, e.yaw_deg,
                                      length, width, round=False, known_class=False))
            continue
        foot = list(cls.length_width_mm)
        length = e.length_mm if e.length_mm is not None else foot[0]
        width = e.width_mm if e.width_mm is not None else foot[1]
        height = e.height_mm if e.height_mm is not None else cls.height_mm
        targets.append(PartTarget(part_id, e.class_name, (e.x_mm, e.y_mm), height, e.yaw_deg, length, width,
                                  round=cls.shape == "cylinder"))
    if problems:
        raise CellFileError(source, problems)
    return targets


def load_parts_file(path: str | os.PathLike, cell) -> list[PartTarget]:
    """Read a parts file (YAML, safe loading) and validate it against ``cell``."""
    data, _ = read_yaml(path, "parts file", max_bytes=MAX_PARTS_FILE_BYTES)
    return parse_parts(data, cell, str(path))
