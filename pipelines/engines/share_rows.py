"""The lifecycle history as the share engine reads it: each row's leaf id, age and quantity, made once a cycle.

The share stage reads the long history several times (each child's own
periods, the window volumes of each class and fallback window, the
per-period methods' rows); `share_rows` gives them one integer period per row
(its age before the cycle date, from one `period_ordinal`) and one mask of the
rows that count (before the cycle date, outside a shortage period left out),
so no reader turns dates into periods again. Sums run over the history's own
leaf ids (`pipelines.keys.Coded.leaf`) and are handed to the children through
one small lookup per leaf, not a gather per row: a child's rows are its leaf's
rows, in the same order, so every sum adds the same values in the same order.

With the rows sorted by leaf id (as the lifecycle stage writes them) the rows
of a few leaves are found from the first row of each leaf (`rows_of`), not by
a pass over the whole history.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from pipelines.calendar import EPOCH_MONDAY_NS, WEEK_NS, period_ordinal
from pipelines.engines.share_settings import ShareSettings
from pipelines.keys import LEAF, PARENT_ID, Coded, ids_in, lookup, row_ids


def period_ages(starts: pd.Series, period: str, cycle_ord: int) -> np.ndarray:
    """cycle_ord minus `period_ordinal` of each start (1 = the period before the cycle), computed in place: one
    array of the history's length, not three."""
    values = starts.to_numpy()
    if period != "week" or values.dtype != "datetime64[ns]" or np.isnat(values).any():
        return cycle_ord - period_ordinal(starts, period)
    age = values.view(np.int64) - EPOCH_MONDAY_NS  # period_ordinal's own floor division, in place
    np.floor_divide(age, WEEK_NS, out=age)
    return np.subtract(cycle_ord, age, out=age)


@dataclass(frozen=True)
class ShareRows:
    """The history's rows for the share engine (see the module docstring)."""

    leaf: np.ndarray  # each row's leaf id (`Coded.leaf`)
    age: np.ndarray  # cycle ordinal minus the row's period ordinal: 1 = the period before the cycle
    qty: np.ndarray
    counts: np.ndarray  # bool: age >= 1 and not in a shortage period left out (`shortage_periods`)
    n_leaves: int
    exclude_shortages: bool
    first: np.ndarray | None  # rows sorted by leaf id: first row of each leaf id 0..n_leaves (the last: len)

    def rows_of(self, leaves: np.ndarray) -> np.ndarray:
        """Positions of the rows of the leaf ids marked True in `leaves` (bool, n_leaves), in row order."""
        if self.first is None:
            return np.flatnonzero(leaves[self.leaf])
        ids = np.flatnonzero(leaves)
        lo, hi = self.first[ids], self.first[ids + 1]
        size = hi - lo
        if not size.sum():
            return np.zeros(0, np.int64)
        # each leaf's run lo..hi-1, the runs one after the other: ascending, as the rows are sorted by leaf id
        return np.repeat(lo - np.cumsum(size) + size, size) + np.arange(int(size.sum()))

    def child_leaves(self, keys: Coded, children: pd.DataFrame) -> np.ndarray:
        """Each child's leaf id in the history (-1: a child without history)."""
        return lookup(children, LEAF, keys.leaves) if self.n_leaves else np.full(len(children), -1, np.int64)


def share_rows(
    history: pd.DataFrame, keys: Coded, period: str, cycle_ord: int, exclude_shortages: bool, short=None
) -> ShareRows:
    """The history's `ShareRows` at the cycle ordinal; short: `shortage_periods(history, exclude_shortages)`."""
    leaf = keys.leaf
    n_leaves = len(keys.leaves)
    age = period_ages(history["period_start"], period, cycle_ord)
    counts = age >= 1
    if short is not None and short.any():
        counts &= ~short
    first = None
    if len(leaf) and bool(np.all(leaf[1:] >= leaf[:-1])):
        first = np.searchsorted(leaf, np.arange(n_leaves + 1))
    return ShareRows(leaf, age, history["quantity"].to_numpy(float), counts, n_leaves, exclude_shortages, first)


def history_rows(history: pd.DataFrame, keys: Coded, settings: ShareSettings, cycle_date: pd.Timestamp) -> ShareRows:
    """The history's `ShareRows` at the cycle date, shortage periods left out as the settings say."""
    cycle_ord = int(period_ordinal(pd.DatetimeIndex([cycle_date]), settings.period)[0])
    short = shortage_periods(history, settings.exclude_shortages)
    return share_rows(history, keys, settings.period, cycle_ord, settings.exclude_shortages, short)


def shortage_periods(history: pd.DataFrame, exclude: bool) -> np.ndarray:
    """True on every history row whose parent x period has a recorded shortage on any row.

    Only with `exclude` (`cleansing.shortages: exclude`): these rows count neither toward
    shares nor toward the parent baseline. Under `fill_baseline` the cleansing
    stage has already replaced their values, so they count like any other row.
    A history without a `shortage` column has none.
    """
    if not exclude or "shortage" not in history.columns or history.empty:
        return np.zeros(len(history), dtype=bool)
    flag = history["shortage"].to_numpy(bool)
    if not flag.any():
        return flag
    parent = history[PARENT_ID].to_numpy() if ids_in(history, (PARENT_ID,)) else row_ids(history)[1]
    rows = _rows_of_parents(parent, np.unique(parent[flag]))  # only the rows of parents with a shortage can have one
    # parent x period on integers: parent id x the period's slot among the days
    day = history["period_start"].to_numpy()[rows].astype("datetime64[D]").view(np.int64)
    day = day - day.min()
    present = np.zeros(int(day.max()) + 1, dtype=bool)
    present[day] = True
    slot = np.cumsum(present) - 1
    code = parent[rows].astype(np.int64) * int(slot[-1] + 1) + slot[day]
    short = np.zeros(int(code.max()) + 1, dtype=bool)
    short[code[flag[rows]]] = True
    out = np.zeros(len(history), dtype=bool)
    out[rows] = short[code]
    return out


def _rows_of_parents(parent: np.ndarray, chosen: np.ndarray) -> np.ndarray:
    """Positions of the rows whose parent id is in `chosen` (sorted, distinct), ascending: from each one's run
    where the rows are sorted by parent id (as the lifecycle stage writes them), else by a pass over every row."""
    if len(parent) > 1 and bool(np.all(parent[1:] >= parent[:-1])):
        lo, hi = np.searchsorted(parent, chosen, "left"), np.searchsorted(parent, chosen, "right")
        size = hi - lo
        return np.repeat(lo - np.cumsum(size) + size, size) + np.arange(int(size.sum()))
    flagged = np.zeros(int(parent.max()) + 1, dtype=bool)
    flagged[chosen] = True
    return np.flatnonzero(flagged[parent])


def child_sums(rows: ShareRows, at: np.ndarray | None, window, leaf_of_child: np.ndarray) -> np.ndarray:
    """Each child's volume over the rows `at` (positions, in order; None: every row) that count and lie inside
    `window` (a number, or one per row); the rows outside add 0.0 (`window_volumes`)."""
    age, qty, counts, leaf = rows.age, rows.qty, rows.counts, rows.leaf
    if at is not None:
        age, qty, counts, leaf = age[at], qty[at], counts[at], leaf[at]
    inside = np.less_equal(age, window)
    inside &= counts
    inside = np.flatnonzero(inside)  # the rows inside alone, in order: the same sums as adding 0.0 for the others
    per_leaf = np.append(np.bincount(leaf[inside], weights=qty[inside], minlength=rows.n_leaves), 0.0)
    return per_leaf[leaf_of_child]  # -1, a child without history: the 0.0 appended
