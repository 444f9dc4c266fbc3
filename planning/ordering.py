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


def order_nearest_two_opt(start_xy, part_xy, bin_xy, max_rounds: int = 20) -> list[int]:
    """Indices of parts in pick order.

    Parameters
    ----------
    start_xy : ndarray, shape (2,)
        Tool position at the start, table mm.
    part_xy, bin_xy : ndarray, shape (N, 2)
        Each part's position and the position of the bin it goes to, table mm.
    """
    part_xy = np.asarray(part_xy, float)
    bin_xy = np.asarray(bin_xy, float)
    n = len(part_xy)
    # every leg's length once: from the start to each part, from each part's bin to each other part
    from_start = np.linalg.norm(part_xy - np.asarray(start_xy, float), axis=1)
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
