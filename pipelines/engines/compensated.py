"""pandas' grouped-sum arithmetic as one compiled step (numba), for the passes that must give its sums bit for bit.

pandas sums a group's float64 values in row order with Kahan's compensation
(`group_sum` / `group_mean` in pandas/_libs/groupby.pyx: y = value - c;
t = sum + y; c = (t - sum) - y; c reset to 0 where it is NaN, as after an
infinite value; NaN values skipped by the caller). The compiled passes over
rows that replace a `groupby(...).sum()` (the report's chart sums, the
lifecycle's sums per origin, the plan's totals per measure, the
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
def first_appearance_sums(key, n_keys, values):
    """(first, sums, rows): the groups of `key` (0..n_keys-1) numbered by first appearance, as `pd.factorize`
    numbers them; each group's first row, its `values` summed as pandas' `groupby(..., sort=False).sum()` sums
    float64 (in row order, `compensated_add`, NaN left out, 0.0 for none), and its rows (NaN ones too)."""
    number = np.full(n_keys, -1, dtype=np.int64)
    total = np.zeros(n_keys)
    comp = np.zeros(n_keys)
    count = np.zeros(n_keys, dtype=np.int64)
    first = np.empty(len(key), dtype=np.int64)
    groups = 0
    for i in range(len(key)):
        k = key[i]
        if number[k] < 0:
            number[k] = groups
            first[groups] = i
            groups += 1
        count[k] += 1
        value = values[i]
        if value == value:
            total[k], comp[k] = compensated_add(total[k], comp[k], value)
    first = first[:groups].copy()
    held = key[first]
    return first, total[held], count[held]
