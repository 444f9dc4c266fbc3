"""The held-part check over a whole sampled chain at once (see :mod:`planning.held` for what is checked).

Every obstacle a plan can meet (the cell's static ones and every part on the table) is stacked once
per plan into an :class:`ObstacleSet`: outlines padded to a common vertex count by repeating their
own vertices cyclically (so every padded edge is one of the outline's own edges, and the set of
separating axes is unchanged), their edge normals, bounding boxes and z ranges. Each held segment
names the obstacles that apply to it with a boolean mask over that set.

:func:`held_part_failure` then works on all held samples of the chain together:

1. the floor test (bottom of the held part against the table or tray floor) on every held sample;
2. pruning by segment: an obstacle whose top (plus clearance) is below the part's lowest bottom over
   the segment, whose bottom is above the part's highest top, or whose xy box is apart from the
   segment's swept xy box by more than ``_BOX_MARGIN_MM`` cannot be hit;
3. pruning by sample on the remaining (segment, obstacle) pairs, with the same z and box tests;
4. the exact separating-axis test (both outlines' edge normals, as :func:`planning.held._separated_xy`)
   on the remaining (sample, obstacle) pairs only.

The first failure is the earliest sample of the earliest failing segment; at one sample the floor
comes before the obstacles, and obstacles come in the set's order (static ones, then parts in the
order they were given), as a per-obstacle loop would find them.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from gripsight.planning.checks import Check, Rejection
from gripsight.planning.held import Obstacle, footprint_outline_mm
from gripsight.planning.motion import SampledChain
from gripsight.planning.targets import PartTarget

__all__ = ["ObstacleSet", "HeldSpec", "held_part_failure", "separated_pairs", "pad_cyclic", "touching_parts",
           "TOUCH_DEPTH_MM"]

_BOX_MARGIN_MM = 1e-3    # boxes closer than this go to the exact test (pruning never decides a near touch)
_FLOOR_EPS_MM = 1e-9     # as the per-sample floor test: below floor - this fails
_TOP_EPS_MM = 1e-9       # as the per-obstacle z test: below top + clearance - this can hit
_FIRST_CHUNK = 8         # held segments checked together first (about two picks), then twice as many


def pad_cyclic(outline_xy_mm: np.ndarray, n_vertices: int) -> np.ndarray:
    """An outline (K, 2) repeated cyclically to ``n_vertices`` >= K vertices (its own vertices only)."""
    k = len(outline_xy_mm)
    return np.asarray(outline_xy_mm, float)[np.arange(n_vertices) % k]


def _edge_normals(outline_xy_mm: np.ndarray) -> np.ndarray:
    """Edge normals (..., K, 2) of outlines (..., K, 2), unnormalised, as the per-pair SAT computes them."""
    e = np.roll(outline_xy_mm, -1, axis=-2) - outline_xy_mm
    return np.stack([-e[..., 1], e[..., 0]], -1)


TOUCH_DEPTH_MM = 1.0     # footprints overlapping less deeply than this are parts touching (see touching_parts)


def touching_parts(parts: list[PartTarget]) -> np.ndarray:
    """(P, P) bool: part i's footprint overlaps part j's, by less than ``TOUCH_DEPTH_MM`` (i's footprint
    shrunk by that on every side is apart from j's). Two solid parts cannot overlap: footprints that do by
    so little are parts standing against each other, placed with the photo's errors (pick points within
    0.5 mm at p95 on photos of another renderer, a footprint's yaw within a degree: 0.2 mm at a 22 mm
    cube's corner). The straight rise off the table cannot hit a part it stands against, since it does
    not move across the table; the carry after it still clears every part's top. A deeper overlap is no
    such pair (one part on another, or a detection gone wrong) and stays an obstacle to the rise.
    Every pair at once (:func:`separated_pairs`)."""
    n = len(parts)
    if n < 2:
        return np.zeros((n, n), bool)

    def outlines(shrink_mm: float) -> np.ndarray:
        own = [footprint_outline_mm(max(p.length_mm - 2 * shrink_mm, 1e-3), max(p.width_mm - 2 * shrink_mm, 1e-3),
                                    p.yaw_deg, p.round) + np.asarray(p.xy_mm, float) for p in parts]
        k = max(len(o) for o in own)
        return np.stack([pad_cyclic(o, k) for o in own])

    full, shrunk = outlines(0.0), outlines(TOUCH_DEPTH_MM)
    i, j = np.nonzero(~np.eye(n, dtype=bool))
    normals = _edge_normals(full)
    overlap = ~separated_pairs(full[i], full[j], normals[j])
    apart_shrunk = separated_pairs(shrunk[i], full[j], normals[j])
    out = np.zeros((n, n), bool)
    out[i, j] = overlap & apart_shrunk
    return out


@dataclass(frozen=True)
class ObstacleSet:
    """N obstacles stacked: outlines padded cyclically to K vertices, their edge normals and boxes."""

    names: tuple[str, ...]
    outline_xy_mm: np.ndarray      # (N, K, 2)
    normals_xy: np.ndarray         # (N, K, 2) edge normals of each outline's own edges (repeated)
    box_lo_mm: np.ndarray          # (N, 2)
    box_hi_mm: np.ndarray          # (N, 2)
    z_lo_mm: np.ndarray            # (N,)
    z_hi_mm: np.ndarray            # (N,)
    clearance_mm: np.ndarray       # (N,)

    @classmethod
    def of(cls, obstacles: list[Obstacle] | tuple) -> "ObstacleSet":
        """Stack obstacles (each outline's normals from its own edges, then padded)."""
        k = max([len(ob.outline_xy_mm) for ob in obstacles], default=1)
        outlines = np.zeros((len(obstacles), k, 2))
        normals = np.zeros((len(obstacles), k, 2))
        for i, ob in enumerate(obstacles):
            own = np.asarray(ob.outline_xy_mm, float)
            outlines[i] = pad_cyclic(own, k)
            normals[i] = pad_cyclic(_edge_normals(own), k)
        return cls(tuple(ob.name for ob in obstacles), outlines, normals,
                   outlines.min(axis=1) if len(obstacles) else np.zeros((0, 2)),
                   outlines.max(axis=1) if len(obstacles) else np.zeros((0, 2)),
                   np.array([ob.z_lo_mm for ob in obstacles], float), np.array([ob.z_hi_mm for ob in obstacles], float),
                   np.array([ob.clearance_mm for ob in obstacles], float))

    def __len__(self) -> int:
        return len(self.names)


@dataclass(frozen=True)
class HeldSpec:
    """What one closed-gripper segment holds and which floor it must stay above (``floor_mm`` None: the
    lift off the table, where the part may not go below where it stood), and which obstacles of
    ``obstacles`` it must clear (``obstacle_mask``, (N,) bool; None: all of them)."""

    part: PartTarget
    hang_mm: float                 # below the tool point
    top_mm: float                  # above the tool point
    base_grip_rad: float
    floor_mm: float | None
    outline_xy_mm: np.ndarray      # (n, 2) the part's footprint around the tool point at grip
    obstacles: ObstacleSet | None = None
    obstacle_mask: np.ndarray | None = None


def separated_pairs(held_xy_mm: np.ndarray, outline_xy_mm: np.ndarray, normals_xy: np.ndarray) -> np.ndarray:
    """Per pair, True where held outline (P, n, 2) and obstacle outline (P, K, 2) are apart: some edge
    normal of either (the held one's from its edges, the obstacle's given, (P, K, 2)) separates their
    projections (separating axis theorem)."""
    axes = np.concatenate([_edge_normals(held_xy_mm), normals_xy], axis=1)
    p = np.einsum("mai,mni->man", axes, held_xy_mm)
    q = np.einsum("mai,mki->mak", axes, outline_xy_mm)
    return ((p.max(-1) <= q.min(-1)) | (q.max(-1) <= p.min(-1))).any(-1)


def _boxes_near(lo_a, hi_a, lo_b, hi_b) -> np.ndarray:
    """Where xy boxes (..., 2) are within ``_BOX_MARGIN_MM`` of each other on both axes."""
    return ((lo_a <= hi_b + _BOX_MARGIN_MM) & (lo_b <= hi_a + _BOX_MARGIN_MM)).all(-1)


def held_part_failure(chain: SampledChain, specs: list, t0_s: float = 0.0) -> tuple[int, Rejection] | None:
    """The first sample of a sampled chain where a held part hits the table, a tray floor or an obstacle.

    Parameters
    ----------
    chain : SampledChain
    specs : list of HeldSpec or None
        One per segment of the chain: what it holds (None: nothing).
    t0_s : float
        Sequence time of the chain's first sample.

    Returns
    -------
    (int, Rejection) or None
        The failing segment's index and the reason (check ``held_part``, the sample time, the value).
    """
    starts = np.asarray(chain.starts, int)
    held = [k for k, spec in enumerate(specs) if spec is not None and starts[k + 1] > starts[k]]
    first, size = 0, _FIRST_CHUNK
    while first < len(held):        # in chain order, chunks growing: most chains fail early
        found = _chunk_failure(chain, specs, held[first:first + size], starts, t0_s)
        if found is not None:
            return found
        first, size = first + size, 2 * size
    return None


def _chunk_failure(chain: SampledChain, specs: list, held: list[int], starts: np.ndarray,
                   t0_s: float) -> tuple[int, Rejection] | None:
    """:func:`held_part_failure` on the held segments ``held`` (indices into the chain, in order)."""
    seg_k = np.array(held)
    n_seg = starts[seg_k + 1] - starts[seg_k]
    seg_first = np.concatenate([[0], np.cumsum(n_seg)[:-1]])           # each held segment's first row
    seg_of = np.repeat(np.arange(len(held)), n_seg)                      # held segment of each row
    rows = starts[seg_k][seg_of] + np.arange(len(seg_of)) - seg_first[seg_of]   # chain sample of each row
    hs = [specs[k] for k in held]
    hang = np.array([s.hang_mm for s in hs], float)
    top_of = np.array([s.top_mm for s in hs], float)
    xyz = chain.xyz_mm[rows]
    bottom, top = xyz[:, 2] - hang[seg_of], xyz[:, 2] + top_of[seg_of]
    floor = np.array([-1e-6 if s.floor_mm is None else s.floor_mm - _FLOOR_EPS_MM for s in hs], float)
    fails = [(np.flatnonzero(bottom < floor[seg_of]), None)]            # (rows, obstacle index or None)

    obs = next((s.obstacles for s in hs if s.obstacles is not None and len(s.obstacles)), None)
    if obs is not None:
        fails.append(_obstacle_hits(chain, hs, obs, rows, seg_of, seg_first, n_seg, xyz, bottom, top))
    best = None
    for hit_rows, which in fails:
        if not hit_rows.size:
            continue
        order = np.lexsort((np.full(hit_rows.size, -1) if which is None else which, hit_rows))
        r, o = int(hit_rows[order[0]]), None if which is None else int(which[order[0]])
        key = (r, -1 if o is None else o)
        if best is None or key < best[0]:
            best = (key, r, o)
    if best is None:
        return None
    _, r, o = best
    j = int(seg_of[r])
    k, spec = held[j], hs[j]
    seg_t0 = t0_s + np.concatenate([[0.0], np.cumsum(chain.durations_s[:-1])])
    i = int(rows[r])
    t = float(seg_t0[k] + chain.t_s[i])
    kind = chain.segments[k].kind.value
    b = float(bottom[r])
    if o is None:
        what = ("the table" if spec.floor_mm is None else "the tray floor" if kind == "descend"
                else "the table, trays and markers it passes")
        limit = 0.0 if spec.floor_mm is None else spec.floor_mm
        return k, Rejection(Check.HELD_PART, f"part {spec.part.id} ({spec.part.height_mm:g} mm tall) would "
                                             f"hang to z={b:.1f} mm, below {limit:g} mm over {what}",
                            kind, t, b, limit, "mm")
    z_hi, clear = float(obs.z_hi_mm[o]), float(obs.clearance_mm[o])
    top_txt = f"top z={z_hi:g} mm" + (f" + {clear:g} mm" if clear else "")
    return k, Rejection(Check.HELD_PART, f"part {spec.part.id} (bottom at z={b:.1f} mm) would hit {obs.names[o]} "
                                         f"({top_txt}) at ({xyz[r, 0]:.1f}, {xyz[r, 1]:.1f}) mm",
                        kind, t, b, z_hi + clear, "mm")


def _obstacle_hits(chain, hs, obs: ObstacleSet, rows, seg_of, seg_first, n_seg, xyz, bottom, top):
    """Rows (into the held samples) and obstacle indices where a held part meets an obstacle, pruned
    by segment, then by sample (the footprint's box: the tool point +- its farthest vertex), then
    tested exactly."""
    # the held footprint turns about the tool point: within a box of its farthest vertex's distance
    radius = np.array([np.hypot(s.outline_xy_mm[:, 0], s.outline_xy_mm[:, 1]).max() for s in hs])[seg_of]
    lo, hi = xyz[:, :2] - radius[:, None], xyz[:, :2] + radius[:, None]                 # (R, 2)
    reach_mm = obs.z_hi_mm + obs.clearance_mm - _TOP_EPS_MM                               # (N,)
    mask = np.stack([np.zeros(len(obs), bool) if s.obstacles is None
                     else np.ones(len(obs), bool) if s.obstacle_mask is None else s.obstacle_mask for s in hs])
    # 1. per segment: its swept box and z range
    seg_lo, seg_hi = np.minimum.reduceat(lo, seg_first), np.maximum.reduceat(hi, seg_first)
    seg_bottom, seg_top = np.minimum.reduceat(bottom, seg_first), np.maximum.reduceat(top, seg_first)
    cand = (mask & (seg_bottom[:, None] < reach_mm) & (seg_top[:, None] > obs.z_lo_mm)
            & _boxes_near(seg_lo[:, None], seg_hi[:, None], obs.box_lo_mm, obs.box_hi_mm))
    pair_seg, pair_ob = np.nonzero(cand)
    if not pair_seg.size:
        return np.zeros(0, int), np.zeros(0, int)
    # 2. per sample, on the segments' candidate obstacles
    count = n_seg[pair_seg]
    pair_of = np.repeat(np.arange(len(pair_seg)), count)
    r = seg_first[pair_seg][pair_of] + np.arange(len(pair_of)) - np.repeat(np.cumsum(count) - count, count)
    o = pair_ob[pair_of]
    keep = ((bottom[r] < reach_mm[o]) & (top[r] > obs.z_lo_mm[o])
            & _boxes_near(lo[r], hi[r], obs.box_lo_mm[o], obs.box_hi_mm[o]))
    r, o = r[keep], o[keep]
    if not r.size:
        return r, o
    # 3. exact, on the pairs left: the held footprints of their samples only
    n_vert = max(len(s.outline_xy_mm) for s in hs)
    local = np.stack([pad_cyclic(s.outline_xy_mm, n_vert) for s in hs])[seg_of[r]]      # (P, n, 2)
    base = np.array([s.base_grip_rad for s in hs], float)
    turn = chain.joints_rad[rows[r], 0] - base[seg_of[r]]
    c, sn = np.cos(turn)[:, None], np.sin(turn)[:, None]
    held_xy = np.stack([c * local[..., 0] - sn * local[..., 1], sn * local[..., 0] + c * local[..., 1]], -1) \
        + xyz[r][:, None, :2]
    n_own = np.array([len(s.outline_xy_mm) for s in hs])[seg_of[r]]
    hit = np.zeros(r.size, bool)
    for n in np.unique(n_own):          # held outlines by vertex count (a box's 4, a round part's 8)
        sel = np.flatnonzero(n_own == n)
        hit[sel] = ~separated_pairs(held_xy[sel, :n], obs.outline_xy_mm[o[sel]], obs.normals_xy[o[sel]])
    return r[hit], o[hit]
