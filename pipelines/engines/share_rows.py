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

The passes over every row are compiled kernels (numba) that read the history's
own arrays and write only the per-leaf results: a week's age from the row
before where the leaf's periods follow each other (one division per run, not
per row), the window sums without a gathered window, mask or compressed copy
per row. Each sum adds a leaf's rows in row order from 0.0, as `np.bincount`
with weights does, so the sums are the same to the bit. The history's length
in fresh memory is what a stage run in one process pays in page faults once
the heap has no freed room left (the kernel's time, often more than the
stage's own): the ages are int32, the leaf ids are read as stored.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from numba import njit

from pipelines.calendar import EPOCH_MONDAY_NS, WEEK_NS, period_ordinal
from pipelines.engines.share_settings import ShareSettings
from pipelines.keys import LEAF, PARENT_ID, Coded, ids_in, lookup, row_ids

NAT = np.iinfo(np.int64).min  # NaT's int64 view


def period_ages(starts: pd.Series, period: str, cycle_ord: int) -> np.ndarray:
    """cycle_ord minus `period_ordinal` of each start (1 = the period before the cycle): weekly starts without
    NaT as int32 in one compiled pass (`_week_ages`), any other as `period_ordinal` gives them (int64)."""
    values = starts.to_numpy()
    if period == "week" and values.dtype == "datetime64[ns]":
        age = np.empty(len(values), dtype=np.int32)
        if _week_ages(values.view(np.int64), cycle_ord, age):
            return age
    return cycle_ord - period_ordinal(starts, period)


@njit(cache=True)
def _next_week_age(value, before, age, cycle_ord):
    """The age of a weekly start `value` (int64 ns) after the row `before` of age `age`: one younger where it is
    the next week (the same ordinal plus one, exactly), else cycle_ord minus `period_ordinal`'s week ordinal."""
    if before != NAT and value - before == WEEK_NS:
        return age - 1
    return cycle_ord - (value - EPOCH_MONDAY_NS) // WEEK_NS


@njit(cache=True)
def _week_ages(ns: np.ndarray, cycle_ord: int, out: np.ndarray) -> bool:
    """out[i] = cycle_ord - floor((ns[i] - EPOCH_MONDAY_NS) / WEEK_NS), `period_ordinal`'s week ordinal; a row one
    week after the row before is one younger (the same ordinal plus one, exactly), so the division is made only
    where a run of consecutive weeks starts. False at the first NaT (out then incomplete)."""
    before = NAT
    age = 0
    for i in range(len(ns)):
        value = ns[i]
        if value == NAT:
            return False
        age = _next_week_age(value, before, age, cycle_ord)
        out[i] = age
        before = value
    return True


@dataclass(frozen=True)
class ShareRows:
    """The history's rows for the share engine (see the module docstring)."""

    leaf: np.ndarray  # each row's leaf id (`Coded.leaf_ids`: as the history holds them)
    age: np.ndarray  # cycle ordinal minus the row's period ordinal: 1 = the period before the cycle (int32 weekly)
    qty: np.ndarray
    counts: np.ndarray  # bool: age >= 1 and not in a shortage period left out (`shortage_periods`)
    n_leaves: int
    exclude_shortages: bool
    first: np.ndarray | None  # rows sorted by leaf id: first row of each leaf id 0..n_leaves (the last: len)
    periods: np.ndarray | None = None  # each leaf id's distinct ages (`_run_periods`), where made with the ages

    def child_leaves(self, keys: Coded, children: pd.DataFrame) -> np.ndarray:
        """Each child's leaf id in the history (-1: a child without history)."""
        return lookup(children, LEAF, keys.leaves) if self.n_leaves else np.full(len(children), -1, np.int64)


def share_rows(
    history: pd.DataFrame, keys: Coded, period: str, cycle_ord: int, exclude_shortages: bool, short=None
) -> ShareRows:
    """The history's `ShareRows` at the cycle ordinal; short: `shortage_periods(history, exclude_shortages)`."""
    leaf = keys.leaf_ids
    n_leaves = len(keys.leaves)
    first = None
    if len(leaf) and bool(np.all(leaf[1:] >= leaf[:-1])):
        # the ids searched in the leaf ids' own type: a wider one would convert the history's ids first
        first = np.searchsorted(leaf, np.arange(n_leaves + 1, dtype=leaf.dtype))
    short = short if short is not None and short.any() else None
    qty = history["quantity"].to_numpy(float)
    starts = history["period_start"].to_numpy()
    if first is not None and period == "week" and starts.dtype == "datetime64[ns]":
        # weekly rows sorted by leaf id: the ages, the rows that count and each leaf's periods in one pass
        age, counts = np.empty(len(leaf), dtype=np.int32), np.empty(len(leaf), dtype=bool)
        periods = np.zeros(n_leaves, dtype=np.int64)
        no_short = np.zeros(0, dtype=bool)
        done, in_order = _week_runs(
            starts.view(np.int64), cycle_ord, first, no_short if short is None else short, age, counts, periods
        )
        if done:
            return ShareRows(
                leaf, age, qty, counts, n_leaves, exclude_shortages, first, periods if in_order else None
            )
    age = period_ages(history["period_start"], period, cycle_ord)
    counts = age >= 1
    if short is not None:
        counts &= ~short
    return ShareRows(leaf, age, qty, counts, n_leaves, exclude_shortages, first)


@njit(cache=True)
def _week_runs(ns, cycle_ord, first, short, age, counts, periods):
    """Over the leaf runs first[l] .. first[l + 1] (rows sorted by leaf id, every row in one): age[i] as
    `_week_ages` makes it, counts[i] = age >= 1 and not short[i] (short empty: none), periods[l] as
    `_run_periods` counts them. (False, -) at the first NaT; (True, False) where an age rises inside a run
    (periods incomplete: the caller counts them another way)."""
    before = NAT
    a = 0
    in_order = True
    with_short = len(short) > 0
    for at in range(len(first) - 1):
        n = 0
        for i in range(first[at], first[at + 1]):
            value = ns[i]
            if value == NAT:
                return False, False
            a = _next_week_age(value, before, a, cycle_ord)
            age[i] = a
            before = value
            counts[i] = a >= 1 and not (with_short and short[i])
            if i == first[at] or age[i] < age[i - 1]:
                n += 1
            elif age[i] > age[i - 1]:
                in_order = False
        periods[at] = n
    return True, in_order


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


def child_sums(rows: ShareRows, leaves: np.ndarray | None, window, leaf_of_child: np.ndarray) -> np.ndarray:
    """Each child's volume over its leaf's rows that count and lie inside `window` (a number, or one per leaf id,
    0 for a leaf whose rows never count), among the leaves marked True in `leaves` (bool, n_leaves; None:
    every leaf): the rows outside add 0.0. A child without history (-1) gets 0.0.

    Summed per leaf in row order by a compiled pass: over the marked leaves' runs (every leaf with a window
    above 0 when none are marked) where the rows are sorted by leaf id (`first`), else over every row."""
    n = rows.n_leaves
    if np.ndim(window) == 0:
        window = np.full(n, window, dtype=np.int32) if leaves is None else np.where(leaves, window, 0).astype(np.int32)
    elif leaves is not None:
        window = np.where(leaves, window, 0).astype(np.int32)
    if rows.first is not None:  # a window of 0 counts no row (they count from age 1)
        ids = np.flatnonzero(leaves if leaves is not None else window > 0)
        per_leaf = _run_window_sums(rows.first, ids, rows.age, rows.qty, rows.counts, window, n)
    else:
        per_leaf = _row_window_sums(rows.leaf, rows.age, rows.qty, rows.counts, window, n)
    return per_leaf[leaf_of_child]  # -1, a child without history: the 0.0 appended


@njit(cache=True)
def _row_window_sums(leaf, age, qty, counts, window, n_leaves):
    """Per leaf id (and a last 0.0): the sum of qty over its rows with counts and age <= window[leaf], in row
    order from 0.0 (`np.bincount`'s sums of those rows)."""
    out = np.zeros(n_leaves + 1)
    for i in range(len(leaf)):
        at = leaf[i]
        if counts[i] and age[i] <= window[at]:
            out[at] += qty[i]
    return out


@njit(cache=True)
def _run_window_sums(first, ids, age, qty, counts, window, n_leaves):
    """`_row_window_sums` over the runs first[l] .. first[l + 1] of the leaf ids `ids` only (the rows sorted by
    leaf id); every other leaf 0.0."""
    out = np.zeros(n_leaves + 1)
    for at in ids:
        w = window[at]
        total = 0.0
        for i in range(first[at], first[at + 1]):
            if counts[i] and age[i] <= w:
                total += qty[i]
        out[at] = total
    return out


def period_sums(rows: ShareRows, member_of_leaf: np.ndarray, window: int, n_members: int) -> np.ndarray:
    """(n_members, window): each member's volume per age 1..window (column a - 1 holds age a) over the rows that
    count of the leaves with a member (`member_of_leaf` >= 0, one leaf per member), in row order from 0.0: the
    cells `np.bincount` of member x age with weights gives."""
    if rows.first is not None:
        ids = np.flatnonzero(member_of_leaf >= 0)
        return _run_period_sums(rows.first, ids, member_of_leaf, rows.age, rows.qty, rows.counts, window, n_members)
    return _row_period_sums(rows.leaf, member_of_leaf, rows.age, rows.qty, rows.counts, window, n_members)


@njit(cache=True)
def _row_period_sums(leaf, member_of_leaf, age, qty, counts, window, n_members):
    out = np.zeros((n_members, window))
    for i in range(len(leaf)):
        m = member_of_leaf[leaf[i]]
        if m >= 0 and counts[i] and 1 <= age[i] <= window:
            out[m, age[i] - 1] += qty[i]
    return out


@njit(cache=True)
def _run_period_sums(first, ids, member_of_leaf, age, qty, counts, window, n_members):
    out = np.zeros((n_members, window))
    for at in ids:
        m = member_of_leaf[at]
        for i in range(first[at], first[at + 1]):
            if counts[i] and 1 <= age[i] <= window:
                out[m, age[i] - 1] += qty[i]
    return out


@njit(cache=True)
def bin_window_volumes(row_bin, age, qty, short, window_of_bin, n_bins):
    """(span, volume) per bin (`row_bin`: each row's bin in 0..n_bins-1): span = the bin's window, cut to its
    history's length (its largest age, at least 0); volume = the sum of its rows' quantities with
    1 <= age <= span and not `short`, in row order from 0.0 (a bincount's sums over those rows). Two passes over
    the rows, nothing of their length written."""
    oldest = np.zeros(n_bins, dtype=np.int64)
    for i in range(len(row_bin)):
        if age[i] > oldest[row_bin[i]]:
            oldest[row_bin[i]] = age[i]
    span = np.minimum(window_of_bin, oldest)
    volume = np.zeros(n_bins)
    for i in range(len(row_bin)):
        b = row_bin[i]
        if 1 <= age[i] <= span[b] and not short[i]:
            volume[b] += qty[i]
    return span, volume
