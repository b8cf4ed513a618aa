"""Integer split: whole units (or packs) that still sum exactly to the parent.

**Largest remainder method** (Hamilton's method, also Hare-Niemeyer; stated
and compared with the divisor methods in Balinski & Young 1975, "The quota
method of apportionment", American Mathematical Monthly 82(7), 701-730): a
parent of U units is split over children with weights w_i by

1. the exact quota q_i = U x w_i / sum_k w_k;
2. the lower quota floor(q_i) to every child;
3. the L = U - sum_i floor(q_i) units left over, one each, to the L children
   with the largest fractional remainders q_i - floor(q_i).

The parts are whole numbers, each within one unit of its quota, and they sum to
U exactly. L is always smaller than the number of children with a positive
remainder, so nobody gets two extra units.

Ties (children whose remainders are equal) are broken, in this order, by

- the larger fractional remainder, compared to 9 decimals, so two remainders
  that are equal in exact arithmetic but differ in the last bits of a float
  count as tied;
- then the larger exact quota (to 9 decimals): the bigger child first;
- then key order: the child that comes first in `order` (the plan passes the
  position of product, site, customer in sorted order).

Packs: a value V is first rounded to the nearest multiple of the pack size p,
a half pack rounding up (towards +infinity): p x floor(V / p + 1/2). The split
then hands out U = that / p packs, so every part is a multiple of p. A negative
value (a planner taking units off) is split by its magnitude and the parts get
its sign.

Vectorised over groups: one sort by (group, remainder desc, quota desc, key
order) and the leftover units handed out by rank within the group; no Python
loop over parents.
"""

from __future__ import annotations

import numpy as np

TIE_DECIMALS = 9


def round_to_pack(value: np.ndarray, pack_size: int) -> np.ndarray:
    """Nearest multiple of `pack_size`, a half pack rounding up: p x floor(V / p + 1/2)."""
    value = np.asarray(value, dtype=float)
    return pack_size * np.floor(value / pack_size + 0.5)


def largest_remainder(
    units: np.ndarray, weight: np.ndarray, group: np.ndarray, order: np.ndarray | None = None
) -> np.ndarray:
    """Whole parts of each group's `units` in proportion to `weight` (Hamilton's method).

    units (G,): non-negative whole number of units of each group.
    weight (m,): non-negative weight of each item; group (m,): its group,
    0..G-1; order (m,): tie-break key, smaller first (default: item position).
    Returns (m,) int64 parts; per group they sum to its units. A group with
    units > 0 must have positive total weight (else ValueError); its items of
    weight 0 get 0.
    """
    units = np.asarray(units)
    if units.size and (units < 0).any():
        raise ValueError("largest_remainder splits non-negative units; split the magnitude and apply the sign")
    units = np.rint(units).astype(np.int64)
    weight = np.asarray(weight, dtype=float)
    group = np.asarray(group, dtype=np.int64)
    m = len(weight)
    order = np.arange(m) if order is None else np.asarray(order)
    if m == 0:
        return np.zeros(0, dtype=np.int64)
    total = np.bincount(group, weights=weight, minlength=len(units))
    short = (units > 0) & (total <= 0)
    if short.any():
        raise ValueError(f"groups {np.flatnonzero(short)[:10].tolist()} have units to split but no positive weight")
    with np.errstate(invalid="ignore", divide="ignore"):
        quota = np.where(total[group] > 0, units[group] * weight / total[group], 0.0)
    lower = np.floor(quota)
    remainder = np.round(quota - lower, TIE_DECIMALS)
    leftover = units - np.bincount(group, weights=lower, minlength=len(units)).astype(np.int64)
    ranked = np.lexsort((order, -np.round(quota, TIE_DECIMALS), -remainder, group))
    g = group[ranked]
    first = np.r_[0, np.flatnonzero(np.diff(g)) + 1]
    rank = np.arange(m) - np.repeat(first, np.diff(np.r_[first, m]))
    parts = lower.astype(np.int64)
    parts[ranked] += (rank < leftover[g]).astype(np.int64)
    return parts
