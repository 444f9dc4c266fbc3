"""What part detection reports: a blob's status, the parts found in a photo, and the photo's detection."""

from __future__ import annotations

from dataclasses import dataclass, field
from enum import StrEnum

import numpy as np

from gripsight.vision.whitebalance import Illumination

__all__ = ["PartStatus", "STATUSES", "DetectedPart", "Detection"]


class PartStatus(StrEnum):
    """What the photo analysis made of a blob."""

    OK = "ok"                              # a part of a known class
    CUT_BY_EDGE = "cut_by_edge"            # cut by the photo's edge, a marker or the searched area
    TOO_SMALL = "too_small"
    TOO_LARGE = "too_large"
    TOUCHING = "touching"                  # touching parts that could not be split
    UNKNOWN_COLOUR = "unknown_colour"      # a part of no class's colour: goes to the reject bin
    UNKNOWN_SHAPE = "unknown_shape"        # a class's colour but no class's shape and size: the reject bin

    @property
    def pickable(self) -> bool:
        """Goes to a bin (its class's, or the reject bin); the others stay on the table."""
        return self in (PartStatus.OK, PartStatus.UNKNOWN_COLOUR, PartStatus.UNKNOWN_SHAPE)


STATUSES = tuple(s.value for s in PartStatus)


@dataclass(frozen=True)
class DetectedPart:
    """A part found in a photo, in table coordinates (footprint centre corrected for parallax)."""

    id: str
    class_name: str
    status: PartStatus
    reason: str
    pixel_uv: tuple[float, float]
    xy_mm: tuple[float, float]
    height_mm: float
    area_mm2: float
    yaw_deg: float
    length_mm: float
    width_mm: float
    seen_as: str
    delta_e: float
    outline_px: np.ndarray = field(repr=False, compare=False, default=None)

    def as_dict(self) -> dict:
        return {"id": self.id, "class": self.class_name, "status": self.status.value, "reason": self.reason,
                "pixel": [round(self.pixel_uv[0], 2), round(self.pixel_uv[1], 2)],
                "table_mm": [round(self.xy_mm[0], 3), round(self.xy_mm[1], 3)], "height_mm": self.height_mm,
                "area_mm2": round(self.area_mm2, 1), "yaw_deg": round(self.yaw_deg, 2),
                "length_mm": round(self.length_mm, 2), "width_mm": round(self.width_mm, 2),
                "seen_as": self.seen_as, "delta_e": round(self.delta_e, 2)}


@dataclass
class Detection:
    parts: list[DetectedPart]
    illumination: Illumination | None
    notes: list[str]
