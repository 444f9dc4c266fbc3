"""Pick order: nearest-next from where the tool is, then 2-opt and relocation passes.

The arm travels from its start to the first part, from each part to its bin, and from that bin to the
next part. The part-to-own-bin legs do not depend on the order, so the cost of an order is
|start - part_1| + sum over k of |bin_k - part_(k+1)| (table-plane distances, mm).
"""

from __future__ import annotations

import numpy as np

__all__ = ["order_nearest_two_opt", "order_cost_mm"]


def order_cost_mm(order, start_xy, part_xy, bin_xy) -> float:
    """Travel (mm) between picks for a given order of part indices."""
    order = list(order)
    if not order:
        return 0.0
    prev = np.vstack([start_xy, bin_xy[order[:-1]]])
    return float(np.linalg.norm(part_xy[order] - prev, axis=1).sum())


#: up to this many parts every 2-opt and relocation neighbour is scored at once (n^3 numbers); beyond,
#: relocation moves are scored one part at a time (O(n) memory, O(n^2) time per round)
EXHAUSTIVE_MAX_PARTS = 40


def order_nearest_two_opt(start_xy, part_xy, bin_xy, max_rounds: int = 20) -> list[int]:
    """Indices of parts in pick order.

    Parameters
    ----------
    start_xy : ndarray, shape (2,)
        Tool position at the start, table mm.
    part_xy, bin_xy : ndarray, shape (N, 2)
        Each part's position and the position of the bin it goes to, table mm.

    Up to :data:`EXHAUSTIVE_MAX_PARTS` parts: nearest-next, then the best 2-opt or relocation neighbour
    while one is better. Beyond: nearest-next, then rounds of relocation (or-opt) moves, each round
    O(n^2) time and O(n) memory, so 1,000 parts take a fraction of a second.
    """
    part_xy = np.asarray(part_xy, float)
    bin_xy = np.asarray(bin_xy, float)
    n = len(part_xy)
    start_xy = np.asarray(start_xy, float)
    if n > EXHAUSTIVE_MAX_PARTS:
        order = _nearest_next(start_xy, part_xy, bin_xy)
        return _relocate(order, start_xy, part_xy, bin_xy, max_rounds)
    # every leg's length once: from the start to each part, from each part's bin to each other part
    from_start = np.linalg.norm(part_xy - start_xy, axis=1)
    between = np.linalg.norm(part_xy[None, :, :] - bin_xy[:, None, :], axis=2)        # [bin of a, part b]
    left = list(range(n))
    order: list[int] = []
    legs = from_start
    while left:
        k = left.pop(int(np.argmin(legs[left])))
        order.append(k)
        legs = between[k]
    best = float(from_start[order[0]] + between[order[:-1], order[1:]].sum()) if order else 0.0
    for _ in range(max_rounds):              # each round moves to the best neighbour, while one is better
        trials = np.array(list(_neighbours(order)), dtype=int).reshape(-1, n)
        if not len(trials):
            break
        costs = from_start[trials[:, 0]] + between[trials[:, :-1], trials[:, 1:]].sum(axis=1)
        j = int(np.argmin(costs))
        if costs[j] >= best - 1e-9:
            break
        order, best = trials[j].tolist(), float(costs[j])
    return order


def _nearest_next(start_xy, part_xy, bin_xy) -> list[int]:
    """Nearest-next order, one row of distances at a time: O(n^2) time, O(n) memory."""
    n = len(part_xy)
    taken = np.zeros(n, bool)
    order = []
    here = start_xy
    for _ in range(n):
        d = np.linalg.norm(part_xy - here, axis=1)
        d[taken] = np.inf
        k = int(np.argmin(d))
        taken[k] = True
        order.append(k)
        here = bin_xy[k]
    return order


def _relocate(order: list[int], start_xy, part_xy, bin_xy, max_rounds: int) -> list[int]:
    """Or-opt: move single parts to the place in the order where they save the most travel, while any does.

    With the tool leaving part k's bin for the next part, removing part a (between exits p and next part
    q) saves |p - a| + |bin_a - q| - |p - q|; inserting it between exit e and part f costs
    |e - a| + |bin_a - f| - |e - f|. Each part's best insertion is found with vectors of length n.
    """
    order = list(order)
    n = len(order)
    for _ in range(max_rounds):
        improved = False
        for a in list(order):
            i = order.index(a)
            rest = order[:i] + order[i + 1:]
            prev_exit = start_xy if i == 0 else bin_xy[order[i - 1]]
            nxt = order[i + 1] if i + 1 < n else None
            saved = np.linalg.norm(part_xy[a] - prev_exit)
            if nxt is not None:
                saved += np.linalg.norm(part_xy[nxt] - bin_xy[a]) - np.linalg.norm(part_xy[nxt] - prev_exit)
            exits = np.vstack([start_xy[None, :], bin_xy[rest]])            # insert before rest[j] or at the end
            entries = part_xy[rest]
            cost = np.linalg.norm(exits - part_xy[a], axis=1)
            cost[:-1] += np.linalg.norm(entries - bin_xy[a], axis=1) - np.linalg.norm(entries - exits[:-1], axis=1)
            j = int(np.argmin(cost))
            if cost[j] < saved - 1e-9:
                order = rest[:j] + [a] + rest[j:]
                improved = True
        if not improved:
            break
    return order


def _neighbours(order: list[int]):
    """2-opt reversals of every sub-sequence, then moves of one part to every other position."""
    n = len(order)
    for i in range(n - 1):
        for j in range(i + 1, n):
            yield order[:i] + order[i:j + 1][::-1] + order[j + 1:]
    for i in range(n):
        rest = order[:i] + order[i + 1:]
        for j in range(n):
            if j != i:
                yield rest[:j] + [order[i]] + rest[j:]
