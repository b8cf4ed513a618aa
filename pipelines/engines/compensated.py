"""pandas' grouped-sum arithmetic as one compiled step (numba), for the passes that must give its sums bit for bit.

pandas sums a group's float64 values in row order with Kahan's compensation
(`group_sum` / `group_mean` in pandas/_libs/groupby.pyx: y = value - c;
t = sum + y; c = (t - sum) - y; c reset to 0 where it is NaN, as after an
infinite value; NaN values skipped by the caller). The compiled passes over
rows that replace a `groupby(...).sum()` (the report's chart sums, the
lifecycle's sums per origin and audit rows, the plan's totals per measure, the
reconciliation's leaf sums per parent period) call this step,
so the one piece of arithmetic they must share is written once.
"""

from __future__ import annotations

import numpy as np
from numba import njit


@njit(cache=True, inline="always")
def compensated_add(total, comp, value):
    """One step of pandas' compensated group sum: the new (sum, compensation), the compensation reset where NaN."""
    y = value - comp
    t = total + y
    comp = t - total - y
    if comp != comp:
        comp = 0.0
    return t, comp


@njit(cache=True)
def group_sizes_and_sums(group, values, n_groups):
    """(rows, pandas' grouped sum of `values` (NaN left out), first row) of each group 0..n_groups - 1 of the
    rows (`group`: each row's group), the rows taken in order: `groupby(...).agg(size, sum)` in one pass."""
    rows = np.zeros(n_groups, np.int64)
    total = np.zeros(n_groups)
    comp = np.zeros(n_groups)
    first = np.full(n_groups, -1, np.int64)
    for i in range(len(group)):
        g = group[i]
        if first[g] < 0:
            first[g] = i
        rows[g] += 1
        if values[i] == values[i]:
            total[g], comp[g] = compensated_add(total[g], comp[g], values[i])
    return rows, total, first


def first_appearance_sums(key, n_keys, values):
    """(first, sums, rows): the groups of `key` (0..n_keys-1) numbered by first appearance, as `pd.factorize`
    numbers them; each group's first row, its `values` summed as pandas' `groupby(..., sort=False).sum()` sums
    float64 (in row order, `compensated_add`, NaN left out, 0.0 for none), and its rows (NaN ones too): the one
    pass of `group_sizes_and_sums`, its groups put in the order of their first rows."""
    rows, total, first = group_sizes_and_sums(key, values, n_keys)
    held = np.flatnonzero(first >= 0)
    order = held[np.argsort(first[held], kind="stable")]
    return first[order], total[order], rows[order]
