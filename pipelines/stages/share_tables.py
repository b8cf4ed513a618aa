"""Stage 4, `share_tables`: each active child's share of its parent for this cycle.

The parent is product x site, the children its customers active at the cycle
date. The window is the `window` periods before the cycle date, per product
class. Share methods (Gross & Sohl 1990; Hyndman & Athanasopoulos, FPP 3rd ed.,
section 11.3):

- `pooled` (proportion of historical averages):
  p_j = sum_t y_{j,t} / sum_t Y_t, with Y_t = sum_j y_{j,t}.
- `mean_of_ratios` (average of historical proportions):
  p_j = (1 / |T+|) sum_{t in T+} y_{j,t} / Y_t, where T+ are the window's
  periods with Y_t > 0. A period with no parent volume has no proportion to
  average, so it is left out (the rule for a zero denominator).

Fallback, recorded per parent: when the parent has no volume in its window,
each of the class's `fallback_windows` is tried in turn (`longer_window`);
when none has volume, the active children share evenly (`even`). A parent
therefore always has shares summing to 1, unlike a plain top-down split, which
has no answer for a parent with no volume.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from pipelines.calendar import ordinal_to_start, period_ordinal
from pipelines.config import PlanningConfig
from pipelines.keys import LEAF, PARENT, factorize, lookup

SHARE_COLUMNS = LEAF + [
    "cycle_date",
    "product_class",
    "share",
    "method",
    "window",
    "window_used",
    "window_start",
    "fallback",
    "child_volume",
    "parent_volume",
]


def window_volumes(age: np.ndarray, qty: np.ndarray, child: np.ndarray, n_children: int, window: int) -> np.ndarray:
    """Volume of each child over the last `window` periods (age 1 = the period before the cycle)."""
    inside = (age >= 1) & (age <= window)
    return np.bincount(child[inside], weights=qty[inside], minlength=n_children)


def mean_of_ratios(
    age: np.ndarray, qty: np.ndarray, child: np.ndarray, parent_of_child: np.ndarray, n_parents: int, window: int
) -> np.ndarray:
    """Average over the window's periods with parent volume of child / parent volume.

    Returns one value per child (0 for a child of a parent with no volume).
    """
    n_children = len(parent_of_child)
    inside = (age >= 1) & (age <= window)
    c, a, q = child[inside], age[inside], qty[inside]
    # child volume per (child, period) and parent volume per (parent, period)
    child_cell = c * window + (a - 1)
    child_t = np.bincount(child_cell, weights=q, minlength=n_children * window).reshape(n_children, window)
    parent_t = np.zeros((n_parents, window))
    np.add.at(parent_t, parent_of_child, child_t)
    denominator = parent_t[parent_of_child]
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = np.where(denominator > 0, child_t / denominator, 0.0)
    periods_with_volume = (parent_t > 0).sum(axis=1)[parent_of_child]
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(periods_with_volume > 0, ratio.sum(axis=1) / periods_with_volume, 0.0)


def compute_shares(
    history: pd.DataFrame, children: pd.DataFrame, config: PlanningConfig, cycle_date: pd.Timestamp
) -> pd.DataFrame:
    """The share table: one row per active child.

    history: lifecycle history (leaf keys, period_start, quantity; all origins).
    children: active children (leaf keys, product_class), from `active_children`.
    """
    period = config.calendar.period
    cycle_ord = int(period_ordinal(pd.DatetimeIndex([cycle_date]), period)[0])
    children = children.reset_index(drop=True)
    n = len(children)
    parent_code, parents = factorize(children, PARENT)
    n_parents = len(parents)
    child_of_row = lookup(history, LEAF, children)
    row_ok = child_of_row >= 0
    child = child_of_row[row_ok]
    qty = history["quantity"].to_numpy(float)[row_ok]
    age = cycle_ord - period_ordinal(history["period_start"], period)[row_ok]

    share = np.zeros(n)
    window_used = np.zeros(n, dtype=np.int64)
    fallback = np.full(n, "even", dtype=object)
    child_volume = np.zeros(n)
    parent_volume = np.zeros(n)
    method = np.empty(n, dtype=object)
    window = np.zeros(n, dtype=np.int64)

    for name, pc in config.product_classes.items():  # a few classes, not a loop over series
        in_class = (children["product_class"] == name).to_numpy()
        if not in_class.any():
            continue
        method[in_class] = pc.method
        window[in_class] = pc.window
        decided = ~in_class  # children of other classes are not ours to decide
        for w in (pc.window, *pc.fallback_windows):
            cv = window_volumes(age, qty, child, n, w)
            pv = np.bincount(parent_code, weights=cv, minlength=n_parents)[parent_code]
            take = ~decided & (pv > 0)
            if pc.method == "pooled":
                s = np.divide(cv, pv, out=np.zeros(n), where=pv > 0)
            else:
                s = mean_of_ratios(age, qty, child, parent_code, n_parents, w)
            share[take] = s[take]
            window_used[take] = w
            fallback[take] = "none" if w == pc.window else "longer_window"
            child_volume[take] = cv[take]
            parent_volume[take] = pv[take]
            decided |= take
        even = ~decided
        if even.any():
            counts = np.bincount(parent_code[even], minlength=n_parents)
            share[even] = 1.0 / counts[parent_code[even]]

    out = children[LEAF].copy()
    out["cycle_date"] = cycle_date
    out["product_class"] = children["product_class"].to_numpy()
    out["share"] = share
    out["method"] = method
    out["window"] = window
    out["window_used"] = window_used
    start_age = np.where(window_used > 0, window_used, window)
    out["window_start"] = ordinal_to_start(cycle_ord - start_age, period)
    out["fallback"] = fallback
    out["child_volume"] = child_volume
    out["parent_volume"] = parent_volume
    return out[SHARE_COLUMNS].sort_values(LEAF, kind="stable").reset_index(drop=True)
