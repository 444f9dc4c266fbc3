"""Servo maps: joint angle (deg) <-> pulse width (us), linear through two calibration points."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from gripsight.planning.errors import ServoRangeError

__all__ = ["ServoMap"]


@dataclass(frozen=True)
class ServoMap:
    """Linear map through two measured points ``(angle_deg, pulse_us)``, with the servo's pulse range.

    Common practice: hobby servos take a pulse every 20 ms (50 Hz) of 500-2500 us (some 1000-2000 us).
    """

    name: str
    channel: int
    angle_deg: tuple[float, float]
    pulse_us: tuple[float, float]
    min_us: float = 500.0
    max_us: float = 2500.0

    @classmethod
    def from_config(cls, name: str, servo) -> "ServoMap":
        (a0, p0), (a1, p1) = servo.map
        return cls(name, servo.channel, (a0, a1), (p0, p1), servo.min_us, servo.max_us)

    @property
    def us_per_deg(self) -> float:
        return (self.pulse_us[1] - self.pulse_us[0]) / (self.angle_deg[1] - self.angle_deg[0])

    def pulse_us_from_deg(self, angle_deg, check: bool = True) -> np.ndarray:
        """Pulse widths for joint angles.

        Parameters
        ----------
        angle_deg : array_like, shape (N,)
            Joint angles in degrees.
        check : bool
            Raise :class:`ServoRangeError` if any pulse falls outside [min_us, max_us].

        Returns
        -------
        ndarray, shape (N,)
            Pulse widths in microseconds.
        """
        angle = np.asarray(angle_deg, dtype=float)
        pulse = self.pulse_us[0] + (angle - self.angle_deg[0]) * self.us_per_deg
        if check:
            bad = ~((pulse >= self.min_us - 1e-9) & (pulse <= self.max_us + 1e-9))
            if np.any(bad):
                i = int(np.flatnonzero(np.ravel(bad))[0])
                a = float(np.ravel(angle)[i])
                p = float(np.ravel(pulse)[i])
                raise ServoRangeError(
                    f"servo {self.name} (channel {self.channel}): {a:.2f} deg needs {p:.0f} us, "
                    f"outside {self.min_us:g}-{self.max_us:g} us; check the joint limits and servo map")
        return pulse

    def deg_from_pulse_us(self, pulse_us) -> np.ndarray:
        """Joint angles in degrees for pulse widths in microseconds (the inverse map)."""
        pulse = np.asarray(pulse_us, dtype=float)
        return self.angle_deg[0] + (pulse - self.pulse_us[0]) / self.us_per_deg
