"""pandas' grouped-sum arithmetic as one compiled step (numba), for the passes that must give its sums bit for bit.

pandas sums a group's float64 values in row order with Kahan's compensation
(`group_sum` / `group_mean` in pandas/_libs/groupby.pyx: y = value - c;
t = sum + y; c = (t - sum) - y; c reset to 0 where it is NaN, as after an
infinite value; NaN values skipped by the caller). The compiled passes over
rows that replace a `groupby(...).sum()` (the report's chart sums, the
lifecycle's sums per origin, the plan's totals per measure) call this step,
so the one piece of arithmetic they must share is written once.
"""

from __future__ import annotations

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
