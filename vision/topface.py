"""The geometry of one blob, in table-mapped millimetres: where its part's footprint centre is.

A part of height h seen from the camera centre C appears scaled by k = C_z / (C_z - h) about the
nadir n. The top face's centre m_top gives the footprint centre c = n + (m_top - n) / k. The top face is
found by fitting the class's shape to the outer half of the blob's outline (:func:`fit_top_faces`, all
blobs of a photo together), the half away from the nadir, which is always the top face's own edge
whichever side faces the colour threshold kept; a row of touching boxes is fitted as one longer box
and cut (:func:`fit_row_of_tops`). The fit with its size free says whether the shape is the class's
(:func:`score_top_faces`); the face is then placed at its known size (:func:`place_top_faces`).
Where no fit holds, the two centroid formulas of DESIGN.md sec. 6 are chosen by the blob's area
(:func:`footprint_centre`).
"""

from __future__ import annotations

from dataclasses import dataclass

import cv2
import numpy as np

from gripsight.vision.robust import masked_median, robust_lm, soft_l1

__all__ = ["outlines_geometry", "expected_area_mm2", "footprint_centre", "outward_normals",
           "TopFaceProblem", "TopFaceScore", "top_face_guess", "fit_top_faces", "score_top_faces", "place_top_faces",
           "fit_row_of_tops", "min_rect",
           "beyond_silhouette_mm", "top_faces_overlap"]


def outlines_geometry(outlines: list[np.ndarray], step: int = 3):
    """Areas (B,), centroids (B, 2) and unit outward normals (one (N_b, 2) array each) of closed
    outlines, all at once. The area and centroid are the polygon's (shoelace); each normal is
    perpendicular to the chord between the neighbours ``step`` points either side, turned outward."""
    lengths = np.array([len(o) for o in outlines])
    starts = np.concatenate([[0], np.cumsum(lengths)[:-1]])
    pts = np.concatenate(outlines).astype(float)
    owner = np.repeat(np.arange(len(outlines)), lengths)
    local = np.arange(len(pts)) - starts[owner]
    size = lengths[owner]

    def shifted(s):
        return pts[starts[owner] + (local + s) % size]

    nxt = shifted(1)
    cross = pts[:, 0] * nxt[:, 1] - nxt[:, 0] * pts[:, 1]
    twice_area = np.add.reduceat(cross, starts)
    with np.errstate(divide="ignore", invalid="ignore"):
        cx = np.add.reduceat((pts[:, 0] + nxt[:, 0]) * cross, starts) / (3.0 * twice_area)
        cy = np.add.reduceat((pts[:, 1] + nxt[:, 1]) * cross, starts) / (3.0 * twice_area)
    flat = np.abs(twice_area) < 2e-9
    centroids = np.column_stack([cx, cy])
    if flat.any():
        centroids[flat] = [o.mean(axis=0) for o, f in zip(outlines, flat) if f]
    tangent = shifted(step) - shifted(-step)
    tangent /= np.maximum(np.sqrt((tangent * tangent).sum(axis=1, keepdims=True)), 1e-12)
    normal = np.column_stack([tangent[:, 1], -tangent[:, 0]]) * np.where(twice_area > 0, 1.0, -1.0)[owner, None]
    return np.where(flat, 0.0, 0.5 * np.abs(twice_area)), centroids, np.split(normal, np.cumsum(lengths)[:-1])


def expected_area_mm2(cls) -> float:
    fp = list(cls.length_width_mm)
    return float(np.pi / 4 * fp[0] * fp[1]) if cls.shape == "cylinder" else float(fp[0] * fp[1])


def footprint_centre(m, area_mapped, nadir, k, expected_mm2, mode: str):
    """(centre, model used) for a blob whose table-mapped centroid is m and area ``area_mapped``.

    ``auto`` predicts the blob's mapped area under each model and takes the nearer: the top face alone
    maps to k^2 A; the top face with the visible sides to about k A + (k - 1) r L, the hull of the
    footprint (scale 1) and the top face (scale k, shifted (k - 1) r away from the nadir), L = sqrt(A).
    """
    if mode == "auto":
        r = float(np.linalg.norm(m - nadir))
        a_top = k * k * expected_mm2
        a_sides = k * expected_mm2 + (k - 1) * r * np.sqrt(expected_mm2)
        mode = "silhouette" if abs(area_mapped - a_sides) < abs(area_mapped - a_top) else "top"
    if mode == "top":
        return nadir + (m - nadir) / k, "top"
    if mode == "silhouette":
        return nadir + (m - nadir) * 2.0 / (1.0 + k), "silhouette"
    return m, "none"


def outward_normals(outline: np.ndarray, step: int = 3) -> np.ndarray:
    """Unit outward normals (N, 2) of a closed outline (:func:`outlines_geometry`)."""
    return outlines_geometry([outline], step)[2][0]


_MAX_POINTS = 60            # outline points per fit (evenly thinned)
_SOFT_L1_MM = 0.15          # scale of the robust loss


@dataclass(frozen=True)
class TopFaceProblem:
    """One blob's top-face fit: its outline and outward normals (table-mapped mm), a first guess of the
    top face's centre, the nadir, the scale k, the footprint's shape and half sizes (mm), a yaw guess."""

    outline_mm: np.ndarray
    normals: np.ndarray
    centre: np.ndarray
    nadir: np.ndarray
    k: float
    round: bool
    half_mm: tuple[float, float]
    yaw_guess_deg: float = 0.0

    @classmethod
    def of_class(cls, outline_mm, normals, centre, nadir, k, part_class, yaw_guess_deg=0.0):
        """The problem for a part class; ``centre`` is the first guess of the top face's centre."""
        fp = list(part_class.length_width_mm)
        return cls(outline_mm, normals, np.asarray(centre, float), np.asarray(nadir, float), float(k),
                   part_class.shape == "cylinder", (fp[0] / 2.0, fp[1] / 2.0), float(yaw_guess_deg))


def _outer_points(problem: TopFaceProblem, centre) -> np.ndarray:
    """The outline beyond ``centre`` away from the nadir, facing away from it, thinned to 60 points."""
    outline = problem.outline_mm
    radial = problem.centre - problem.nadir
    norm = float(np.hypot(*radial))
    if norm > 1e-6:
        e_r = radial / norm
        outline = outline[((outline - centre) @ e_r >= 0.0) & (problem.normals @ e_r > -0.1)]
    if len(outline) > _MAX_POINTS:
        outline = outline[:: int(np.ceil(len(outline) / _MAX_POINTS))]
    return outline


def _shape_residuals(point_sets, round_, half):
    """Residuals of R fits at once: signed distance (mm) of each problem's points to its circle or
    rectangle with parameters (centre x, y, yaw rad, scale); padded points give 0."""
    n_max = max(len(p) for p in point_sets)
    pts = np.zeros((len(point_sets), n_max, 2))
    mask = np.zeros((len(point_sets), n_max))
    for i, p in enumerate(point_sets):
        pts[i, :len(p)], mask[i, :len(p)] = p, 1.0
    px, py, mask = pts[None, ..., 0].transpose(1, 0, 2), pts[None, ..., 1].transpose(1, 0, 2), mask[:, None, :]
    hx, hy = half[:, 0, None, None], half[:, 1, None, None]
    any_round, all_round = bool(np.any(round_)), bool(np.all(round_))
    round_ = round_[:, None, None]

    def residual(p):
        dx, dy = px - p[..., 0:1], py - p[..., 1:2]
        scale = p[..., 3:4]
        if all_round:
            return (np.sqrt(dx * dx + dy * dy) - scale * hx) * mask
        c, sn = np.cos(p[..., 2:3]), np.sin(p[..., 2:3])
        qx = np.abs(dx * c + dy * sn) - scale * hx
        qy = np.abs(dy * c - dx * sn) - scale * hy
        ox, oy = np.maximum(qx, 0.0), np.maximum(qy, 0.0)          # (np.hypot is slow)
        # outside: the distance to the nearest corner or side; inside: minus the distance to the nearest side
        box = np.sqrt(ox * ox + oy * oy) + np.minimum(np.maximum(qx, qy), 0.0)
        if any_round:
            box = np.where(round_, np.sqrt(dx * dx + dy * dy) - scale * hx, box)
        return box * mask

    return residual, mask[:, 0, :]


def top_face_guess(m, area_mapped, nadir, k, expected_mm2) -> np.ndarray:
    """A first guess of a blob's top-face centre (table-mapped mm): the footprint centre of the area
    model (:func:`footprint_centre`, ``auto``) scaled back up by k about the nadir."""
    centre, _ = footprint_centre(np.asarray(m, float), area_mapped, nadir, k, expected_mm2, "auto")
    return nadir + k * (centre - nadir)


def fit_top_faces(problems: list[TopFaceProblem]) -> list:
    """Fit each problem's top face (circle, or rectangle of its footprint's proportions; centre, yaw,
    size free) to the outer half of its blob's outline: the half away from the nadir, which is always
    the top face's own edge whichever side faces the segmentation kept (outline points facing away
    from the nadir, beyond the first guess of the centre (:func:`top_face_guess`): the sides' own
    edges face the nadir). A rectangle starts from its yaw guess and 45 degrees on, the better kept.
    A robust loss (soft L1, 0.15 mm) discounts the stretches of outline that run from the top face
    down the visible sides. All problems are fitted together.

    Returns, per problem, None if the outline does not look like the shape (fewer than 12 points, a
    scale off k by more than 15 %, or a median residual over 0.4 mm), else (top face centre in
    table-mapped mm, unit vector of the footprint's first axis, fitted scale). The centre and axis are
    those of :func:`place_top_faces` (the face at its known size); the scale is the free fit's."""
    scores, outer = _score_top_faces(problems)
    return place_top_faces(problems, [s.fit for s in scores], outer)


def place_top_faces(problems: list[TopFaceProblem], fits: list, outer: dict | None = None) -> list:
    """Each held fit (as :func:`score_top_faces` gives it; None stays None) with its centre and axis
    fitted again to the same outer outline, the top face now at its known size: the class's footprint
    scaled by k (the camera's height and the class's height give k; the cell gives the footprint).

    The free scale is what tells a class's shape and size from another's, but it also takes up whatever
    the outline has lost or gained: a stretch of the outer edge eaten by a weak contrast, or a noisy
    edge, shrinks or grows the face about a centre that then moves with it, since only the outer half
    is seen. At its known size the face can only move to fit. Measured on the outside set (nominal
    photos), pick-point RMS 0.151 -> about 0.06 mm with the edges of :mod:`vision.outlineedge`; a part
    printed 0.2 mm over its nominal size moves its estimate by about 0.1 mm along the camera's radial.
    The fitted scale stays in the result (it is the measured size, which the reports give). ``outer``
    (problem index -> its outer outline points) saves finding them again."""
    held = [i for i, f in enumerate(fits) if f is not None]
    out = list(fits)
    if not held:
        return out
    outer = outer or {}
    sets = [outer[i] if i in outer else _outer_points(problems[i], problems[i].centre) for i in held]
    residual, _ = _shape_residuals(sets, np.array([problems[i].round for i in held]),
                                   np.array([problems[i].half_mm for i in held], float))
    k = np.array([problems[i].k for i in held])[:, None, None]

    def at_known_size(p):                       # (R, m, 3) centre x, y, yaw -> residuals with scale k
        return residual(np.concatenate([p, np.broadcast_to(k, p.shape[:2] + (1,))], axis=-1))

    starts = np.array([[fits[i][0][0], fits[i][0][1], np.arctan2(fits[i][1][1], fits[i][1][0])] for i in held])
    x, _ = robust_lm(at_known_size, starts, _SOFT_L1_MM, iterations=2)      # from the free fit's place: two steps (equal figures to four)
    for i, params in zip(held, x):
        yaw = 0.0 if problems[i].round else params[2]
        out[i] = (params[:2].copy(), np.array([np.cos(yaw), np.sin(yaw)]), fits[i][2])
    return out


@dataclass(frozen=True)
class TopFaceScore:
    """How well one problem's shape fits its blob: the fit (as :func:`fit_top_faces` returns it, None
    when it does not hold), the median absolute residual (mm) and the fitted scale over k (nan when
    there were too few outline points to fit)."""

    fit: tuple | None
    median_mm: float
    scale_ratio: float


def score_top_faces(problems: list[TopFaceProblem]) -> list[TopFaceScore]:
    """:func:`fit_top_faces` with the figures its verdict rests on, per problem (all fitted together)."""
    return _score_top_faces(problems)[0]


def _score_top_faces(problems: list[TopFaceProblem]) -> tuple[list[TopFaceScore], dict]:
    """:func:`score_top_faces`, and each fitted problem's outer outline points (index -> (N, 2))."""
    nan = float("nan")
    results = [TopFaceScore(None, nan, nan)] * len(problems)
    rows, starts, sets, outer = [], [], [], {}
    for i, p in enumerate(problems):
        pts = _outer_points(p, p.centre)
        if len(pts) < 12:
            continue
        outer[i] = pts
        for yaw in ([0.0] if p.round else [p.yaw_guess_deg, p.yaw_guess_deg + 45.0]):
            rows.append(i)
            starts.append([p.centre[0], p.centre[1], np.radians(yaw), p.k])
            sets.append(pts)
    if not rows:
        return results, outer
    x, r, mask = _fit(sets, [problems[i] for i in rows], np.array(starts))
    cost = soft_l1(r, _SOFT_L1_MM)
    median = masked_median(np.abs(r), mask > 0)
    best: dict[int, int] = {}
    for j, i in enumerate(rows):
        if i not in best or cost[j] < cost[best[i]]:
            best[i] = j
    for i, j in best.items():
        params = x[j]
        ratio = float(params[3] / problems[i].k)
        fit = None
        if 0.85 < ratio < 1.15 and median[j] <= 0.4:
            yaw = 0.0 if problems[i].round else params[2]
            fit = (params[:2].copy(), np.array([np.cos(yaw), np.sin(yaw)]), float(params[3]))
        results[i] = TopFaceScore(fit, float(median[j]), ratio)
    return results, outer


def _fit(point_sets, problems, starts):
    residual, mask = _shape_residuals(point_sets, np.array([p.round for p in problems]),
                                      np.array([p.half_mm for p in problems], float))
    return (*robust_lm(residual, starts, _SOFT_L1_MM), mask)


def fit_row_of_tops(outline_mm, normals, m, area_mapped, nadir, k, cls, pieces):
    """Touching boxes face to face make one box n parts long: fit that (along either side of the class's
    footprint) to the blob's outline (mapped centroid m, mapped area ``area_mapped``) and cut it into n
    top faces. Returns each piece's top-face centre (table-mapped mm), in the pieces' order, or None if
    the row does not fit."""
    n = len(pieces)
    fp = list(cls.length_width_mm)
    _, _, yaw_guess = min_rect(outline_mm, k)
    nadir = np.asarray(nadir, float)
    guess = top_face_guess(m, area_mapped, nadir, k, n * expected_area_mm2(cls))
    rows = ((fp[0], fp[1]), (fp[1], fp[0]))
    fits = fit_top_faces([TopFaceProblem(outline_mm, normals, guess, nadir, float(k), False,
                                         (n * along / 2.0, across / 2.0), yaw_guess) for along, across in rows])
    piece_centres = np.array([p[0] for p in pieces])
    best = None
    for (along, _), fit in zip(rows, fits):
        if fit is None:
            continue
        centre, axis, scale = fit
        tops = centre + np.outer((np.arange(n) - (n - 1) / 2) * along * scale, axis)
        cost = np.linalg.norm(tops[:, None, :] - piece_centres[None], axis=2)
        order = np.argmin(cost, axis=0)                          # the top nearest each k-means piece
        if len(set(order.tolist())) != n or cost[order, np.arange(n)].max() > 0.5 * along * scale:
            continue
        spread = cost[order, np.arange(n)].max()
        if best is None or spread < best[0]:
            best = (spread, tops[order])
    return None if best is None else list(best[1])


def min_rect(points_mm: np.ndarray, scale: float):
    (_, _), (a, b), ang = cv2.minAreaRect(points_mm.astype(np.float32))
    if a >= b:
        length, width, yaw = a, b, ang
    else:
        length, width, yaw = b, a, ang + 90.0
    yaw = (yaw + 90.0) % 180.0 - 90.0
    return float(length / scale), float(width / scale), float(yaw)


def beyond_silhouette_mm(points_mm: np.ndarray, fit, nadir, k: float, part_class) -> np.ndarray:
    """How far (mm, 0 inside) each outline point (N, 2; table-mapped mm) lies outside the silhouette of a
    part whose top face was fitted (``fit`` as :func:`fit_top_faces` gives it): the top face swept toward
    the nadir down to the footprint (centre n + (m - n) / k, scale 1/k), the part's visible sides
    included. An outline that runs past it belongs to something larger than the part: the fit's gates
    look at the outer half of the outline only, where a corner of a larger box fits any box."""
    centre, axis, scale = fit
    nadir = np.asarray(nadir, float)
    half = np.asarray(part_class.length_width_mm, float) / 2.0
    bottom = nadir + (np.asarray(centre, float) - nadir) / k
    t = np.linspace(0.0, 1.0, 6)[:, None, None]
    centres = centre + t * (bottom - centre)                       # (6, 1, 2)
    scales = (scale * (1.0 - t) + (scale / k) * t)[..., 0]          # (6, 1)
    d = np.asarray(points_mm, float)[None] - centres                # (6, N, 2)
    along, across = d @ axis, d @ np.array([-axis[1], axis[0]])
    if part_class.shape == "cylinder":
        dist = np.sqrt(along * along + across * across) - scales * half[0]
    else:
        qx, qy = np.abs(along) - scales * half[0], np.abs(across) - scales * half[1]
        dist = np.sqrt(np.maximum(qx, 0.0) ** 2 + np.maximum(qy, 0.0) ** 2)
    return np.maximum(dist.min(axis=0), 0.0)


def _top_face_distance_mm(points_mm: np.ndarray, fit, part_class) -> np.ndarray:
    """Signed distance (mm, negative inside) of points (N, 2) to a fitted top face (``fit`` as
    :func:`fit_top_faces` gives it, for a part of ``part_class``)."""
    centre, axis, scale = fit
    half = np.asarray(part_class.length_width_mm, float) / 2.0 * scale
    d = np.asarray(points_mm, float) - centre
    along, across = d @ axis, d @ np.array([-axis[1], axis[0]])
    if part_class.shape == "cylinder":
        return np.sqrt(along * along + across * across) - half[0]
    qx, qy = np.abs(along) - half[0], np.abs(across) - half[1]
    return np.sqrt(np.maximum(qx, 0.0) ** 2 + np.maximum(qy, 0.0) ** 2) + np.minimum(np.maximum(qx, qy), 0.0)


def top_faces_overlap(fitted: list) -> float:
    """The largest fraction of one fitted top face that lies inside another, over pairs of (fit, class):
    touching parts' top faces meet but do not overlap; pieces that do are one part counted twice (a row
    of a disc, a cube and a disc is as long as four cubes). Each face is sampled on a 9 x 9 grid inside its
    edges (a face's own edge meets its neighbour's)."""
    s = np.linspace(-0.5, 0.5, 11)[1:-1]
    gx, gy = np.meshgrid(s, s)
    unit = np.column_stack([gx.ravel(), gy.ravel()])
    worst = 0.0
    for i, (fit_i, cls_i) in enumerate(fitted):
        centre, axis, scale = fit_i
        local = unit * np.asarray(cls_i.length_width_mm, float) * scale
        if cls_i.shape == "cylinder":
            local = local[(unit ** 2).sum(axis=1) <= 0.25 + 1e-9]
        pts = centre + local[:, :1] * axis + local[:, 1:] * np.array([-axis[1], axis[0]])
        for j, (fit_j, cls_j) in enumerate(fitted):
            if j != i:
                worst = max(worst, float((_top_face_distance_mm(pts, fit_j, cls_j) < 0.0).mean()))
    return worst
