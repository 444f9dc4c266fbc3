"""The safety cautions (DESIGN.md sec. 11): in the README and at the top of every emitted sequence."""

from __future__ import annotations

__all__ = ["SAFETY_LINES"]

SAFETY_LINES = (
    "Run every new sequence first with the gripper empty and at reduced speed.",
    "Keep hands out of the arm's reach envelope while it is powered.",
    "Keep a power cut (an emergency stop or the supply switch) within reach.",
    "Follow the rules that apply where the cell runs: ISO 10218 for industrial robots; "
    "local codes and licensed practice prevail.",
)
