"""Top-face fits on outlines of known geometry (exact circles and rectangles drawn by this test), and
the batched fit against fits one at a time."""

from __future__ import annotations

import numpy as np
import pytest

from gripsight.vision.robust import masked_median
from gripsight.vision.topface import TopFaceProblem, fit_top_faces, outward_normals, score_top_faces


def _circle(centre, radius, n=240):
    t = np.linspace(0, 2 * np.pi, n, endpoint=False)
    return np.column_stack([centre[0] + radius * np.cos(t), centre[1] + radius * np.sin(t)])


def _rectangle(centre, length, width, yaw_rad, per_side=60):
    s = np.linspace(-0.5, 0.5, per_side, endpoint=False)
    local = np.concatenate([np.column_stack([s * length, np.full_like(s, -width / 2)]),
                            np.column_stack([np.full_like(s, length / 2), s * width]),
                            np.column_stack([-s * length, np.full_like(s, width / 2)]),
                            np.column_stack([np.full_like(s, -length / 2), -s * width])])
    c, sn = np.cos(yaw_rad), np.sin(yaw_rad)
    return local @ np.array([[c, sn], [-sn, c]]) + centre


def _problem(outline, guess, k, round_, half, yaw_deg=0.0):
    return TopFaceProblem(outline, outward_normals(outline), np.asarray(guess, float), np.zeros(2), k, round_,
                          half, yaw_deg)


def test_exact_shapes_are_recovered():
    """A top face scaled by k (1.03) is recovered from a first guess 1.5 mm off: centre within 0.01 mm,
    scale within 1e-3, the rectangle's axis within 0.1 degrees."""
    k = 1.03
    circle = _circle((150.0, 40.0), k * 15.0)
    rect = _rectangle((-80.0, 120.0), k * 40.0, k * 20.0, np.radians(25.0))
    fits = fit_top_faces([_problem(circle, (151.5, 39.0), k, True, (15.0, 15.0)),
                          _problem(rect, (-79.0, 121.0), k, False, (20.0, 10.0), 20.0)])
    (c1, _, s1), (c2, axis, s2) = fits
    assert np.hypot(*(c1 - (150.0, 40.0))) < 0.01 and s1 == pytest.approx(k, abs=1e-3)
    assert np.hypot(*(c2 - (-80.0, 120.0))) < 0.01 and s2 == pytest.approx(k, abs=1e-3)
    angle = np.degrees(np.arctan2(axis[1], axis[0])) % 180.0
    assert angle == pytest.approx(25.0, abs=0.1)


def test_batched_fit_equals_fits_one_at_a_time():
    rng = np.random.default_rng(3)
    problems = []
    for i in range(12):
        centre = rng.uniform(-200, 200, 2)
        k = rng.uniform(1.01, 1.05)
        if i % 2:
            outline = _circle(centre, k * 12.0) + rng.normal(0, 0.05, (240, 2))
            problems.append(_problem(outline, centre + rng.normal(0, 1, 2), k, True, (12.0, 12.0)))
        else:
            yaw = rng.uniform(-80, 80)
            outline = _rectangle(centre, k * 30.0, k * 18.0, np.radians(yaw)) + rng.normal(0, 0.05, (240, 2))
            problems.append(_problem(outline, centre + rng.normal(0, 1, 2), k, False, (15.0, 9.0), yaw + 4.0))
    together = fit_top_faces(problems)
    for problem, fit in zip(problems, together):
        alone = fit_top_faces([problem])[0]
        np.testing.assert_allclose(fit[0], alone[0], atol=1e-9)


def test_an_outline_of_another_size_is_refused():
    """A circle 30 % larger than the class at this k is not its top face (the scale check, 15 %)."""
    outline = _circle((0.0, 100.0), 1.3 * 1.02 * 15.0)
    assert fit_top_faces([_problem(outline, (0.0, 100.0), 1.02, True, (15.0, 15.0))]) == [None]


def test_masked_median_matches_numpy():
    rng = np.random.default_rng(0)
    values = rng.normal(size=(20, 31))
    mask = rng.random((20, 31)) < 0.6
    mask[3] = False
    expected = [np.median(v[m]) if m.any() else np.nan for v, m in zip(values, mask)]
    np.testing.assert_allclose(masked_median(values, mask), expected)


def test_a_face_placed_at_its_known_size_is_not_moved_by_noise_on_its_outer_half():
    """25 mm square top faces (k 1.035, nadir at the origin, 150 mm out along +x) turned 30 and 45 degrees,
    so the outer half the fit sees is two edges meeting at a corner, with 0.15 mm of noise on every outline
    point. With its size free the fit can shrink the face toward that corner or grow it away, and its
    centre follows; at its known size (25 k) the face can only move. Plane geometry: the true centre is
    known."""
    rng = np.random.default_rng(1)
    k, centre = 1.035, np.array([150.0, 0.0])
    free_err, placed_err = [], []
    for yaw in (30.0, 45.0, 30.0, 45.0):
        outline = _rectangle(centre, k * 25.0, k * 25.0, np.radians(yaw), per_side=120)
        outline += rng.normal(0.0, 0.15, outline.shape)
        problem = _problem(outline, centre + (0.8, -0.5), k, False, (12.5, 12.5), yaw + 3.0)
        free = score_top_faces([problem])[0].fit
        placed = fit_top_faces([problem])[0]
        assert placed[2] == free[2]            # the measured size stays the free fit's
        free_err.append(np.hypot(*(free[0] - centre)))
        placed_err.append(np.hypot(*(placed[0] - centre)))
    assert max(placed_err) < 0.1
    assert np.sqrt(np.mean(np.square(free_err))) > 3 * np.sqrt(np.mean(np.square(placed_err)))
