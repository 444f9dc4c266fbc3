"""Servo maps: linear through two points, inverse, range check (values of common practice)."""

from __future__ import annotations

import numpy as np
import pytest

from gripsight.planning.errors import ServoRangeError
from gripsight.planning.servo import ServoMap


def test_common_practice_map_centre_and_ends():
    # Common practice: 500-2500 us over 180 deg, 1500 us at the centre, 50 Hz frames.
    servo = ServoMap("base", 0, (-90.0, 90.0), (500.0, 2500.0))
    np.testing.assert_allclose(servo.pulse_us_from_deg([-90, 0, 45, 90]), [500, 1500, 2000, 2500])
    assert servo.us_per_deg == pytest.approx(2000 / 180)


def test_inverse_round_trip_and_reversed_servo():
    servo = ServoMap("elbow", 2, (0.0, 120.0), (2300.0, 700.0))  # mounted the other way round
    angles = np.linspace(0, 120, 25)
    np.testing.assert_allclose(servo.deg_from_pulse_us(servo.pulse_us_from_deg(angles)), angles, atol=1e-12)
    assert servo.pulse_us_from_deg([60.0])[0] == pytest.approx(1500.0)


def test_out_of_range_pulse_names_servo_angle_and_range():
    servo = ServoMap("shoulder", 1, (-15.0, 165.0), (500.0, 2500.0))
    with pytest.raises(ServoRangeError, match=r"servo shoulder \(channel 1\): 170.00 deg needs 2556 us, outside 500-2500 us"):
        servo.pulse_us_from_deg([10.0, 170.0])
    assert servo.pulse_us_from_deg([170.0], check=False)[0] == pytest.approx(2500 + 5 * 2000 / 180)
