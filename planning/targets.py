"""Parts to pick, in table coordinates: the plain data class the application hands the planner.

It is filled from a photo's detections or from a parts file (both in :mod:`gripsight.app`).
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["PartTarget"]


@dataclass(frozen=True)
class PartTarget:
    """A part on the table, ready to plan.

    Attributes
    ----------
    id : str
        Unique id within one photo or parts file.
    class_name : str
        Colour class (a key of the cell's ``parts``), or a name the cell does not know.
    xy_mm : tuple of float
        Footprint centre in the table frame, mm.
    height_mm : float
        Part height above the table.
    yaw_deg : float
        Direction of the footprint's length axis from +x toward +y.
    length_mm, width_mm : float
        Footprint along and across the length axis (a cylinder: both the diameter).
    round : bool
        True for a cylinder (the width across the jaws is the diameter at any yaw).
    known_class : bool
        False for a class the cell does not know (planned to the ``reject`` bin).
    pixel_uv : tuple of float or None
        Where it was seen in the photo (u, v px), if it came from one.
    pickable : bool
        False when the photo analysis set the part aside (cut by an edge, too small, ...): the planner
        rejects it with ``vision_status`` as the reason.
    vision_status, vision_detail : str
        What the photo analysis said (``ok``, ``unknown_colour``, ``cut_by_edge``, ...), as labels.
    """

    id: str
    class_name: str
    xy_mm: tuple[float, float]
    height_mm: float
    yaw_deg: float = 0.0
    length_mm: float = 20.0
    width_mm: float = 20.0
    round: bool = False
    known_class: bool = True
    pixel_uv: tuple[float, float] | None = None
    pickable: bool = True
    vision_status: str = "ok"
    vision_detail: str = ""
