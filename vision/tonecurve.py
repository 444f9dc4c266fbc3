"""How a camera's grey codes encode light, found at calibration from the markers' printed size.

The marker corners are the crossings of the 50 % level between ink and paper *in light*
(:mod:`gripsight.vision.markeredges`), so the edges need the curve that turns the photo's codes into
light. Cameras that write JPEGs encode by the sRGB curve (common practice); a photo whose codes are
already linear in light (a machine-vision camera's raw mode, some renderers) read through the sRGB curve
puts every edge toward the paper: each black square looks larger than printed, by 0.2-0.7 px on an
outside set of such photos, and no table mapping can explain that. So the curve is the one under which
the markers fit their layout best: calibration is done under the sRGB curve and under power laws
(light = code ** p), and the least residual wins; the sRGB curve is kept unless a power does clearly
better (:data:`KEEP_SRGB_WITHIN`). The result is a property of the camera, stored with the calibration
and used for every later photo's markers.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from gripsight.vision.calibration import Calibration, CalibrationError, calibrate
from gripsight.vision.markers import MarkerDetection, detect_markers

__all__ = ["calibrate_photo", "TONE_POWERS", "KEEP_SRGB_WITHIN"]

#: candidate powers (light = code ** p): 1 for codes linear in light, about 2.2 for the sRGB curve's
#: middle, up to what a strong tone curve uses
TONE_POWERS = (0.6, 0.8, 1.0, 1.2, 1.4, 1.7, 2.0, 2.4, 2.8)
#: the sRGB curve is kept unless a power lowers the residual below this fraction of its own: sRGB and a
#: power near 2.2 are the same curve within the residual's noise on sRGB photos, and the curve cameras
#: write is the better guess there
KEEP_SRGB_WITHIN = 0.9


def calibrate_photo(image, cell, photo: str = "photo", lens=None,
                    search_ids=None) -> tuple[Calibration, list[MarkerDetection]]:
    """Detect the markers of a calibration photo and calibrate, choosing the grey-to-light curve of least
    residual (see the module docstring); the calibration's ``tone_power`` is None for the sRGB curve.

    Returns the calibration and the markers as refined under the chosen curve.

    Raises
    ------
    CalibrationError
        As :func:`gripsight.vision.calibration.calibrate` does under the sRGB curve.
    """
    size = (image.shape[1], image.shape[0])
    ids = search_ids if search_ids is not None else cell.markers.layout

    def attempt(tone_power):
        found = detect_markers(image, cell.markers.dictionary, search_ids=ids, tone_power=tone_power)
        return calibrate(found, cell, size, photo, lens=lens), found

    best, best_found = attempt(None)          # raises what a plain calibration raises
    tried = {}
    for p in TONE_POWERS:
        try:
            tried[p] = attempt(p)
        except CalibrationError:
            continue
    if tried:
        powers = sorted(tried)
        rms = np.array([tried[p][0].rms_mm for p in powers])
        k = int(np.argmin(rms))
        if 0 < k < len(powers) - 1:             # the minimum between the grid's points: a parabola's vertex
            p_vertex = _parabola_vertex(powers[k - 1:k + 2], rms[k - 1:k + 2])
            if p_vertex is not None:
                try:
                    tried[p_vertex] = attempt(p_vertex)
                except CalibrationError:
                    pass
        p_best = min(tried, key=lambda p: tried[p][0].rms_mm)
        if tried[p_best][0].rms_mm < KEEP_SRGB_WITHIN * best.rms_mm and tried[p_best][0].used:
            cal, found = tried[p_best]
            note = (f"the photo's grey codes encode light as code^{p_best:.2f}, not by the sRGB curve: marker "
                    f"residual {best.rms_mm:.3f} -> {cal.rms_mm:.3f} mm RMS")
            return dataclasses.replace(cal, tone_power=round(float(p_best), 3), notes=[*cal.notes, note]), found
    return best, best_found


def _parabola_vertex(x, y) -> float | None:
    """The vertex of the parabola through three points (x ascending), if it opens upward and lies
    between the outer two."""
    a, b, _ = np.polyfit(np.asarray(x, float), np.asarray(y, float), 2)
    if a <= 0:
        return None
    v = -b / (2 * a)
    return float(v) if x[0] < v < x[-1] else None
