"""Camera-to-table calibration from the printed markers in one photo.

Every corner of every marker lying on the table is a correspondence (photo pixel <-> table mm).

1. Markers that cannot be used are set aside with a reason: ids not in the layout, ids seen twice,
   raised markers (they serve the camera centre, not the table plane).
2. ``H_table_from_pixel`` is fitted jointly with the lens (Fitzgibbon's division model when the cell asks
   ``lens: estimate``) by ``scipy.optimize.least_squares`` on the table-mm residuals, starting from the
   normalised DLT (:mod:`vision.tablefit`). A marker that the fit of the others puts more than 1 mm and 5x their typical residual
   from its place is left out, and the fit is repeated. Why it is off is then read from its corners:
   through the others' fit they still make its printed square (a rigid move: it has *moved* on the
   table), or they do not (a side short, a corner off: something stands in front of it, it is *hidden*).
   With the camera centre (step 4), a raised marker's stand whose image on the table covers a marker's
   square or quiet zone is named: set aside as hidden by it, or kept, with a note, if its corners fit.
3. The division model is kept only when it lowers the RMS residual by at least 20 % and the markers
   reach far enough from the image centre to show the distortion; otherwise no lens correction.
4. The camera centre: measured (``camera.centre_mm``), or from raised markers. A raised corner P at height
   z appears, through the table mapping, at q = C + (P - C) C_z / (C_z - z): linear in
   (C_xy (1 - k), k) with k = C_z / (C_z - z) for one height, refined over all raised corners by least
   squares; C_z = k z / (k - 1). Without either, the nadir is assumed under the image centre.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from enum import StrEnum

import numpy as np

from gripsight.vision.camerapose import fit_pinhole
from gripsight.vision.errors import CalibrationError
from gripsight.vision.homography import FitFailure, TableMapping
from gripsight.vision.settings import LensMode
from gripsight.vision.markers import MarkerDetection
from gripsight.vision.markergeom import marker_paper_corners_mm, stands_in_front
from gripsight.vision.tablefit import fit_table_mapping, fit_used_markers, marker_residuals_mm

__all__ = ["Calibration", "CalibrationError", "MarkerFit", "MarkerRole", "CentreSource", "Verdict", "calibrate",
           "camera_centre_from_raised", "VERDICTS"]

_MOVED_MIN_MM = 1.0
_OUTLIER_FACTOR = 5.0       # beyond this many times the other markers' typical residual, a marker is off
_LENS_GAIN = 0.8            # keep the division model if it brings the RMS below 80 % of the plain fit
_LENS_MIN_REACH = 0.55      # ... and used corners reach this fraction of the half-diagonal from the centre
_CENTRE_MIN_MARKERS = 6     # markers needed to fit the distortion centre as well
_CENTRE_GAIN = 0.85         # ... kept if it brings the RMS below 85 % of the centred model's
_DEFAULT_HEIGHT_MM = 750.0
# camera-centre priors (fit_pinhole): a tape-measured height is good to about 10 % (a rough figure, from
# memory of how cells are set up); the principal point of a fixed lens lies within about 1 % of the image
# diagonal of the image centre (or of the distortion centre) -- common practice to assume it at the centre,
# the figure from memory; a lens file's K is taken as known.
_HEIGHT_SD = 0.10
_NO_HEIGHT_SD_GAIN = 3.0     # no height in the cell: the 750 mm default, three times as loose
_PP_SD = 0.005
_KNOWN_PP_SD_PX = 0.25
_MIN_NOISE_PX = 0.05
class Verdict(StrEnum):
    """How good a calibration is (see :func:`_verdict`)."""

    GOOD = "good"
    FAIR = "fair"
    POOR = "poor"


class CentreSource(StrEnum):
    """Where the camera centre came from."""

    MEASURED = "measured"                  # camera.centre_mm in the cell
    RAISED_MARKERS = "raised_markers"      # fitted from the raised markers' corners
    ASSUMED = "assumed"                    # nadir under the image centre, camera.height_mm or a default


class MarkerRole(StrEnum):
    """What a detected marker did in a calibration."""

    USED = "used"                          # its corners went into the table mapping
    RAISED = "raised"                      # above the table: used for the camera centre
    MOVED = "moved"                        # set aside: the others put its printed square elsewhere (moved on the table?)
    HIDDEN = "hidden"                      # set aside: its corners do not make its printed square (partly hidden)
    NOT_IN_LAYOUT = "not_in_layout"        # an id the cell's layout does not have
    DUPLICATE = "duplicate"                # an id seen more than once in the photo


VERDICTS = tuple(v.value for v in Verdict)


@dataclass
class MarkerFit:
    """One marker's part in a calibration."""

    id: int
    corners_px: np.ndarray                 # (4, 2) as detected
    corners_mm: np.ndarray | None          # (4, 3) from the layout, None if not in it
    used: bool
    reason: str = ""
    role: MarkerRole = MarkerRole.USED
    residual_mm: float | None = None       # RMS over its corners
    residual_px: float | None = None
    vectors_px: np.ndarray | None = None   # (4, 2) predicted - observed, for the overlay

    @property
    def raised(self) -> bool:
        return self.corners_mm is not None and float(self.corners_mm[0, 2]) > 0


@dataclass
class Calibration:
    """The result: the mapping, the camera centre, per-marker residuals, and a verdict."""

    mapping: TableMapping
    camera_centre_mm: np.ndarray
    centre_source: CentreSource
    markers: list[MarkerFit]
    image_size: tuple[int, int]           # (width, height) px
    rms_mm: float
    max_mm: float
    rms_px: float
    max_px: float
    verdict: Verdict
    notes: list[str] = field(default_factory=list)
    tone_power: float | None = None       # the photo's grey codes -> light: None the sRGB curve (vision.tonecurve)

    @property
    def used(self) -> list[MarkerFit]:
        return [m for m in self.markers if m.used]


def _table_markers(detections: list[MarkerDetection], cell):
    layout = cell.markers.layout
    counts: dict[int, int] = {}
    for d in detections:
        counts[d.id] = counts.get(d.id, 0) + 1
    fits = []
    for d in detections:
        corners_mm = None
        if d.id in layout:
            corners_mm = marker_paper_corners_mm(layout[d.id], cell.markers.size_mm)
        if d.id not in layout:
            fits.append(MarkerFit(d.id, d.corners_px, None, False, "not in the cell's layout", MarkerRole.NOT_IN_LAYOUT))
        elif counts[d.id] > 1:
            fits.append(MarkerFit(d.id, d.corners_px, corners_mm, False, f"id seen {counts[d.id]} times in the photo",
                                  MarkerRole.DUPLICATE))
        elif layout[d.id].z > 0:
            fits.append(MarkerFit(d.id, d.corners_px, corners_mm, False, "raised: used for the camera centre",
                                  MarkerRole.RAISED))
        else:
            fits.append(MarkerFit(d.id, d.corners_px, corners_mm, True))
    return fits


def _fit_with_outliers(fits, lens_kind, image_size, fixed_lens, photo):
    """Fit, then test the worst marker against a fit of the others (leave one out): if the others
    predict it more than 1 mm and 5x their own typical residual away, it is set aside (moved or hidden:
    :func:`_why_off`); repeat."""
    while True:
        mapping, res = fit_used_markers(fits, lens_kind, image_size, fixed_lens, photo)
        used = [f for f in fits if f.used]
        if len(used) <= 4:
            return mapping, res
        worst = used[int(np.argmax(marker_residuals_mm(mapping, used)))]
        worst.used = False
        try:
            others, _ = fit_used_markers(fits, lens_kind, image_size, fixed_lens, photo)
        except CalibrationError:
            worst.used = True
            return mapping, res
        rest = [f for f in fits if f.used]
        predicted = float(marker_residuals_mm(others, [worst])[0])
        typical = float(np.median(marker_residuals_mm(others, rest)))
        if predicted > max(_MOVED_MIN_MM, _OUTLIER_FACTOR * typical):
            worst.role, worst.reason = _why_off(worst, others, typical)
            continue
        worst.used = True
        return mapping, res


def _rigid_fit_mm(square_mm: np.ndarray, seen_mm: np.ndarray) -> tuple[np.ndarray, float, float]:
    """The rigid motion that best puts a printed square's corners (4, 2) table mm on the corners seen
    (4, 2) table mm, by least squares (the 2-D case of Kabsch's fit: the turn about the centroids from the
    summed cross and dot products): (shift (2,) mm, turn rad, RMS mm of what it leaves)."""
    p0, q0 = square_mm.mean(axis=0), seen_mm.mean(axis=0)
    a, b = square_mm - p0, seen_mm - q0
    turn = float(np.arctan2((a[:, 0] * b[:, 1] - a[:, 1] * b[:, 0]).sum(), (a * b).sum()))
    rot = np.array([[np.cos(turn), -np.sin(turn)], [np.sin(turn), np.cos(turn)]])
    rest = b - a @ rot.T
    return q0 - p0, turn, float(np.sqrt((rest ** 2).sum(axis=1).mean()))


def _why_off(fit: MarkerFit, others: TableMapping, typical_mm: float) -> tuple[MarkerRole, str]:
    """Why a marker the others put elsewhere is off. A marker moved on the table is still its printed
    square: through the others' mapping its corners fit the square by a rigid motion, leaving no more
    than the others' own scatter. A marker partly hidden (a stand, a part over its edge, an arm in the
    photo) was found by the part of its edges in view: a side comes out short or a corner off, and no
    rigid motion explains its corners (more than ``_OUTLIER_FACTOR`` times the others' typical residual
    is left, the test that set it aside)."""
    seen = others(fit.corners_px)
    square = fit.corners_mm[:, :2]
    shift, turn, rest = _rigid_fit_mm(square, seen)
    off = float(np.sqrt(((seen - square) ** 2).sum(axis=1).mean()))
    if rest > _OUTLIER_FACTOR * typical_mm:
        sides = np.linalg.norm(seen - np.roll(seen, -1, axis=0), axis=1)
        printed = float(np.linalg.norm(square[1] - square[0]))
        return MarkerRole.HIDDEN, (f"partly hidden? its corners do not make its printed {printed:g} mm square (sides "
                                   f"{sides.min():.1f}-{sides.max():.1f} mm; {off:.1f} mm from where the other markers "
                                   "put it): something over its edge or in front of it")
    turned = f", turned {np.degrees(turn):.1f} deg," if abs(np.degrees(turn)) >= 0.05 else ""
    return MarkerRole.MOVED, (f"moved on the table? {np.linalg.norm(shift):.1f} mm{turned} from where the other "
                              "markers put it")


def _left_out_mm(fits: list[MarkerFit], fit: MarkerFit, mapping: TableMapping, image_size) -> tuple[float, float]:
    """How far the other used markers put a used one (RMS over its corners, mm) and their own typical (median)
    residual, by a fit of the others through the mapping's lens; (0, inf) where the others cannot be fitted."""
    rest = [f for f in fits if f.used and f is not fit]
    if len(rest) < 4:
        return 0.0, np.inf
    uv = np.concatenate([f.corners_px for f in rest])
    xy = np.concatenate([f.corners_mm[:, :2] for f in rest])
    try:
        others, _ = fit_table_mapping(uv, xy, "fixed", image_size, fixed_lens=mapping.lens)
    except (FitFailure, ValueError):
        return 0.0, np.inf
    return float(marker_residuals_mm(others, [fit])[0]), float(np.median(marker_residuals_mm(others, rest)))


def _stands_in_front(fits: list[MarkerFit], cell, centre_mm: np.ndarray, mapping: TableMapping, image_size,
                     notes: list[str]) -> set[int]:
    """Name the raised markers' stands that cover a table marker as the camera at ``centre_mm`` sees it
    (:func:`gripsight.vision.markergeom.stands_in_front`): a marker set aside is hidden by the stand; one
    not seen gets a note. One kept is tested again without the 1 mm floor of the leave-one-out test (the
    floor keeps small offsets from being called moves; here the cause is known): if the others put it more
    than ``_OUTLIER_FACTOR`` times their typical residual away, its id is returned (to be set aside), else
    it stays, with a note. Returns the ids to set aside."""
    seen = {f.id: f for f in fits if f.corners_mm is not None and not f.raised
            and f.role in (MarkerRole.USED, MarkerRole.MOVED, MarkerRole.HIDDEN)}
    off = set()
    for o in stands_in_front(cell.markers.layout, cell.markers.size_mm, cell.markers.margin_mm, centre_mm):
        f = seen.get(o.marker_id)
        where = f"raised marker {o.stand_id}'s stand stands in front of marker {o.marker_id} as the camera sees it"
        if f is None:
            notes.append(f"{where} ({o.describe()}); marker {o.marker_id} not seen")
        elif f.used:
            predicted, typical = _left_out_mm(fits, f, mapping, image_size)
            if predicted > _OUTLIER_FACTOR * typical:
                off.add(f.id)
            else:
                notes.append(f"{where} ({o.describe()}); its corners fit ({predicted:.2f} mm from where the other "
                             "markers put them), kept")
        else:
            f.role = MarkerRole.HIDDEN
            f.reason = (f"partly hidden by raised marker {o.stand_id}'s stand as the camera sees it ({o.describe()}); "
                        f"its corners are {f.residual_mm:.1f} mm from where the other markers put them")
    return off


def camera_centre_from_raised(mapping: TableMapping, raised: list[MarkerFit]) -> np.ndarray:
    """Camera centre (3,) in table mm from raised markers' corners seen through the table mapping."""
    q = np.concatenate([mapping(f.corners_px) for f in raised])           # (N, 2) where they appear
    P = np.concatenate([f.corners_mm for f in raised])                     # (N, 3) where they are
    z = P[:, 2]
    # linear start with one k for the mean height
    A = np.zeros((2 * len(q), 3))
    A[0::2, 0] = 1
    A[1::2, 1] = 1
    A[0::2, 2] = P[:, 0]
    A[1::2, 2] = P[:, 1]
    a1, a2, k = np.linalg.lstsq(A, q.ravel(), rcond=None)[0]
    zr = float(z.mean())
    if k <= 1.0 + 1e-6:
        raise CalibrationError("the raised markers do not show the camera's perspective (is their height right?)")
    c0 = np.array([a1 / (1 - k), a2 / (1 - k), k * zr / (k - 1)])

    def residual(c):
        kk = c[2] / (c[2] - z)
        return (c[:2] + (P[:, :2] - c[:2]) * kk[:, None] - q).ravel()

    from scipy.optimize import least_squares

    return least_squares(residual, c0, method="lm").x


def _pinhole_centre(mapping, image_size, used, raised, height_mm, rms_px) -> np.ndarray:
    """The camera centre (3,) table mm of the pinhole that best explains every marker corner
    (:func:`camerapose.fit_pinhole`); NaNs where the fit fails."""
    floor_px = np.concatenate([f.corners_px for f in used])
    floor_mm = np.concatenate([f.corners_mm for f in used])
    raised_px = np.concatenate([f.corners_px for f in raised]) if raised else None
    raised_mm = np.concatenate([f.corners_mm for f in raised]) if raised else None
    height = height_mm or _DEFAULT_HEIGHT_MM
    known_pp = hasattr(mapping.lens, "K")
    try:
        centre, _, _ = fit_pinhole(mapping, image_size, floor_px, floor_mm, raised_px, raised_mm,
                                   height_mm=height,
                                   height_sd_mm=_HEIGHT_SD * height * (1.0 if height_mm else _NO_HEIGHT_SD_GAIN),
                                   pp_sd_px=_KNOWN_PP_SD_PX if known_pp else _PP_SD * float(np.hypot(*image_size)),
                                   noise_px=max(rms_px, _MIN_NOISE_PX))
    except (ValueError, np.linalg.LinAlgError):
        return np.full(3, np.nan)
    return np.asarray(centre, float)


def _verdict(rms_mm: float, max_mm: float, n_used: int) -> Verdict:
    if rms_mm <= 0.25 and max_mm <= 1.0 and n_used >= 4:
        return Verdict.GOOD
    if rms_mm <= 0.6 and max_mm <= 2.0:
        return Verdict.FAIR
    return Verdict.POOR


def calibrate(detections: list[MarkerDetection], cell, image_size: tuple[int, int], photo: str = "photo",
              lens=None) -> Calibration:
    """Fit the pixel -> table mapping, lens and camera centre from one photo's markers.

    Parameters
    ----------
    detections : list of MarkerDetection
    cell : the cell (uses ``markers`` and ``camera``)
    image_size : (width, height) in px
    photo : str
        Name used in messages.
    lens : OpenCVLens, optional
        A known lens (``camera.lens: file``); then only the homography is fitted.

    Raises
    ------
    CalibrationError
        Fewer than 3 usable table markers, or markers nearly in a line.
    """
    if not detections:
        raise CalibrationError(f"{photo}: no {cell.markers.dictionary} markers found; check the dictionary in "
                               "the cell file, the lighting and the focus")
    behind: set[int] = set()
    while True:                  # again without the markers a stand covers whose corners are off (at most once each)
        cal, more = _calibrate(detections, cell, image_size, photo, lens, behind)
        if not more:
            return cal
        behind |= more


def _calibrate(detections, cell, image_size, photo, lens, behind: set[int]) -> tuple[Calibration, set[int]]:
    """:func:`calibrate` with the markers ``behind`` a stand set aside from the start; returns the calibration
    and the markers a stand covers that were kept but whose corners the others put off (to set aside too)."""
    fits = _table_markers(detections, cell)
    for f in fits:
        if f.id in behind and f.used:
            f.used, f.role, f.reason = False, MarkerRole.HIDDEN, "partly hidden by a raised marker's stand"
    mode = cell.camera.lens
    notes = []
    if lens is not None or mode == LensMode.NONE:
        kind, fixed = "fixed", lens
    else:
        kind, fixed = "division", None
    mapping, res = _fit_with_outliers(fits, kind, image_size, fixed, photo)
    if kind == "division":
        plain_fits = [replace(f) for f in fits]          # the plain fit may set other markers aside
        plain, res_plain = _fit_with_outliers(plain_fits, "fixed", image_size, None, photo)
        rms_plain = float(np.sqrt((res_plain ** 2).sum(axis=1).mean()))
        rms_div = float(np.sqrt((res ** 2).sum(axis=1).mean()))
        uv_used = np.concatenate([f.corners_px for f in fits if f.used])
        reach = np.linalg.norm(uv_used - mapping.lens.centre_px, axis=1).max() / mapping.lens.scale_px
        if not (rms_div < _LENS_GAIN * rms_plain and reach >= _LENS_MIN_REACH):
            why = ("it did not lower the residual by 20 %" if rms_div >= _LENS_GAIN * rms_plain
                   else "the markers do not reach far enough toward the image corners")
            notes.append(f"lens distortion not estimated: {why} ({rms_plain:.3f} -> {rms_div:.3f} mm RMS)")
            mapping, res, fits = plain, res_plain, plain_fits
        else:
            notes.append(f"lens: division model lambda={mapping.lens.lam:.5f} took the RMS from "
                         f"{rms_plain:.3f} to {rms_div:.3f} mm")
            used = [f for f in fits if f.used]
            if len(used) >= _CENTRE_MIN_MARKERS:     # enough markers to place the distortion centre too
                uv_u = np.concatenate([f.corners_px for f in used])
                xy_u = np.concatenate([f.corners_mm[:, :2] for f in used])
                try:
                    moved, res_c = fit_table_mapping(uv_u, xy_u, "division_centre", image_size, start=mapping)
                except (FitFailure, ValueError):
                    moved = None
                if moved is not None:
                    rms_c = float(np.sqrt((res_c ** 2).sum(axis=1).mean()))
                    shift = np.subtract(moved.lens.centre_px, mapping.lens.centre_px)
                    if rms_c < _CENTRE_GAIN * rms_div and np.hypot(*shift) < 0.1 * mapping.lens.scale_px:
                        notes.append(f"lens: distortion centre moved by ({shift[0]:.0f}, {shift[1]:.0f}) px from the "
                                     f"image centre, RMS {rms_div:.3f} -> {rms_c:.3f} mm")
                        mapping, res = moved, res_c
    # residuals per marker, in mm (table) and px (photo)
    for f in fits:
        if f.corners_mm is None or f.raised:
            continue
        pred_mm = mapping(f.corners_px)
        pred_px = mapping.inverse(f.corners_mm[:, :2])
        f.residual_mm = float(np.sqrt(((pred_mm - f.corners_mm[:, :2]) ** 2).sum(axis=1).mean()))
        f.residual_px = float(np.sqrt(((pred_px - f.corners_px) ** 2).sum(axis=1).mean()))
        f.vectors_px = pred_px - f.corners_px
    used = [f for f in fits if f.used]
    err_mm = np.concatenate([np.linalg.norm(mapping(f.corners_px) - f.corners_mm[:, :2], axis=1) for f in used])
    err_px = np.concatenate([np.linalg.norm(f.vectors_px, axis=1) for f in used])
    rms_mm, max_mm = float(np.sqrt((err_mm ** 2).mean())), float(err_mm.max())
    rms_px, max_px = float(np.sqrt((err_px ** 2).mean())), float(err_px.max())

    raised = [f for f in fits if f.role is MarkerRole.RAISED]
    if cell.camera.centre_mm is not None:
        centre, source = np.array(cell.camera.centre_mm, float), CentreSource.MEASURED
    else:
        centre = _pinhole_centre(mapping, image_size, used, raised, cell.camera.height_mm, rms_px)
        if raised:
            if not (np.all(np.isfinite(centre)) and centre[2] > 2 * max(float(f.corners_mm[0, 2]) for f in raised)):
                centre = camera_centre_from_raised(mapping, raised)
            source = CentreSource.RAISED_MARKERS
        else:
            height = cell.camera.height_mm or _DEFAULT_HEIGHT_MM
            source = CentreSource.ASSUMED
            if not np.all(np.isfinite(centre)):
                w, h = image_size
                nadir = mapping(np.array([[(w - 1) / 2, (h - 1) / 2]]))[0]
                centre = np.array([nadir[0], nadir[1], height])
            notes.append(f"camera centre assumed: {centre[2]:.0f} mm up "
                         f"{'(camera.height_mm ' + format(height, 'g') + ' mm)' if cell.camera.height_mm else '(default; set camera.height_mm or add a raised marker)'}"
                         f", over the nadir the table's perspective shows ({centre[0]:.0f}, {centre[1]:.0f}) mm")
    more = _stands_in_front(fits, cell, np.asarray(centre, float), mapping, image_size, notes)
    return Calibration(mapping, np.asarray(centre, float), source, fits, tuple(image_size), rms_mm, max_mm,
                       rms_px, max_px, _verdict(rms_mm, max_mm, len(used)), notes), more

