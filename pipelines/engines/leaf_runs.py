"""A history's rows as one run per leaf in period order, and ranges of those runs.

The history tables hold millions of rows over about a hundred thousand leaves;
a rule decided per leaf (its span, its product's retirement) keeps or drops one
range of each leaf's rows once the rows are read leaf by leaf in period order.
`leaf_runs` reads a frame so, without moving a row when the frame is already
grouped by leaf with ascending periods (as the cleansing stage writes it), else
through one stable sort; `expand` turns ranges into positions; `span_rows`
finds each leaf's rows inside its span by a binary search of every leaf at
once; `take_history` builds the numeric columns of the ranges a stage keeps in
one compiled pass (numba): the rows copied, the ids written along each range,
and the rows and pandas' grouped sum of the quantity per group of ranges added
up on the way (no index of every row, no group code per row, no second read).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from numba import njit

from pipelines.engines.compensated import compensated_add
from pipelines.keys import LEAF, factorize
from pipelines.text_codes import run_starts


@dataclass(frozen=True)
class LeafRuns:
    """A history's rows as one run per leaf, each run in period order: leaf `l` (row `l` of `leaves`) holds
    the run positions `first[l]` .. `end[l] - 1`, which are the rows `order[...]` (`order` None: the same
    positions, the history being so ordered already)."""

    leaves: pd.DataFrame
    first: np.ndarray
    end: np.ndarray
    order: np.ndarray | None

    def rows(self, at: np.ndarray) -> np.ndarray:
        return at if self.order is None else self.order[at]

    def rows_of_ranges(self, starts: list, lengths: list, leaves: list) -> tuple[np.ndarray, np.ndarray]:
        """The rows of the run ranges (start, length and leaf of each range) in row order, and their leaves."""
        start, length, leaf = (np.concatenate(x) for x in (starts, lengths, leaves))
        by = np.argsort(start, kind="stable")
        at, leaf = expand(start[by], length[by]), np.repeat(leaf[by], length[by])
        if self.order is None:
            return at, leaf
        at = self.order[at]
        by = np.argsort(at, kind="stable")
        return at[by], leaf[by]


def leaf_runs(frame: pd.DataFrame, starts: np.ndarray) -> LeafRuns:
    """The rows of `frame` as runs of one leaf in period order (`starts`: each row's period start).

    The leaves are coded on the first row of each run of one key object only (`text_codes.run_starts`), as
    `keys.factorize` codes them (first appearance). When each leaf is one run whose starts ascend (ties
    keep row order), as the cleaned history is written, the runs are the rows themselves; otherwise one
    stable sort by leaf and period start orders them.
    """
    n = len(frame)
    columns = [frame[c].to_numpy() for c in LEAF]
    at = run_starts(columns) if n and all(v.dtype == object for v in columns) else np.arange(n)
    code, leaves = factorize(pd.DataFrame({c: v[at] for c, v in zip(LEAF, columns, strict=True)}), LEAF)
    new = np.ones(len(code), dtype=bool)
    new[1:] = code[1:] != code[:-1]
    at, code = at[new], code[new]  # neighbouring runs of one key joined
    stop = np.append(at[1:], n).astype(np.int64)
    time = time_key(starts)
    if len(code) == len(leaves):
        ascending = time[1:] >= time[:-1]
        ascending[at[1:] - 1] = True  # a leaf's first row may start earlier than the row before it
        if bool(ascending.all()):
            first, end = np.empty(len(leaves), np.int64), np.empty(len(leaves), np.int64)
            first[code], end[code] = at, stop
            return LeafRuns(leaves, first, end, None)
    leaf = np.repeat(code, stop - at)
    end = np.cumsum(np.bincount(leaf, minlength=len(leaves)))
    return LeafRuns(leaves, end - np.bincount(leaf, minlength=len(leaves)), end, np.lexsort((time, leaf)))


def time_key(starts: np.ndarray) -> np.ndarray:
    """An integer per period start, ordered as the starts are (NaT first): their nanoseconds (no copy)."""
    return starts.view(np.int64) if starts.dtype.kind == "M" else pd.factorize(starts, sort=True)[0]


def expand(start: np.ndarray, length: np.ndarray) -> np.ndarray:
    """The positions of the ranges [start, start + length), one range after the other."""
    total = int(length.sum())
    dtype = np.int32 if total < 2**31 and (not len(start) or int(start.max()) < 2**31) else np.int64
    out = np.arange(total, dtype=dtype)
    out += np.repeat((start - (np.cumsum(length) - length)).astype(dtype), length)
    return out


def first_at_least(ordinal, first: np.ndarray, end: np.ndarray, bound: np.ndarray) -> np.ndarray:
    """Per range [first, end) of run positions whose period ordinals ascend (`ordinal(positions)`): the first
    position whose ordinal is at least `bound` (`end` when none). A binary search of every range at once."""
    low, high = first.astype(np.int64), end.astype(np.int64)
    todo = np.flatnonzero(low < high)
    while len(todo):
        mid = (low[todo] + high[todo]) // 2
        below = ordinal(mid) < bound[todo]
        low[todo[below]] = mid[below] + 1
        high[todo[~below]] = mid[~below]
        todo = todo[low[todo] < high[todo]]
    return low


def span_rows(runs: LeafRuns, leaf_span: np.ndarray, s_from: np.ndarray, s_to: np.ndarray, ordinal):
    """Per leaf, the run positions [inside, after) of its rows inside its span (`leaf_span`: row of the
    spans, -1: none; `s_from`, `s_to`: period ordinals, NaN = open), the rows `calendar.active_mask` keeps;
    `ordinal(positions)`: their period ordinals, ascending along each leaf's run."""
    has = leaf_span >= 0
    at = np.clip(leaf_span, 0, None)
    low = s_from[at] if len(s_from) else np.full(len(at), np.nan)
    high = s_to[at] if len(s_to) else np.full(len(at), np.nan)
    inside, after = runs.first.copy(), runs.first.copy()  # no span: no row inside
    closed = has & ~np.isnan(low)
    inside[closed] = first_at_least(ordinal, runs.first[closed], runs.end[closed], low[closed].astype(np.int64))
    after[has] = runs.end[has]
    closed = has & ~np.isnan(high)
    after[closed] = first_at_least(ordinal, inside[closed], runs.end[closed], high[closed].astype(np.int64) + 1)
    return inside, np.maximum(inside, after)


@dataclass(frozen=True)
class HistoryRows:
    """The columns `take_history` gives and what it summed on the way: rows and quantity per group (pandas'
    grouped sum) and the rows flagged as a shortage."""

    starts: np.ndarray
    quantity: np.ndarray
    shortage: np.ndarray
    leaf_id: np.ndarray
    parent_id: np.ndarray
    group_rows: np.ndarray
    group_sums: np.ndarray
    shortage_rows: int


def take_history(runs: LeafRuns, start: np.ndarray, length: np.ndarray, starts: np.ndarray, quantity: np.ndarray,
                 shortage: np.ndarray, leaf_id: np.ndarray, parent_id: np.ndarray, group: np.ndarray,
                 n_groups: int) -> HistoryRows:
    """The history's rows of the run ranges [start, start + length), one range after the other (`expand`'s
    positions read through `runs.rows`): their period starts (datetime64), quantities and shortage flags, each
    range's `leaf_id` and `parent_id` along it, and, on the same pass, the rows and the pandas grouped sum of the
    quantity per `group` of the ranges (0 .. n_groups - 1) and the shortage rows. One compiled pass
    (`_take_ranges`): no index of every row, no second read of the result."""
    order = np.zeros(0, np.int64) if runs.order is None else runs.order.astype(np.int64, copy=False)
    out = _take_ranges(start.astype(np.int64), length.astype(np.int64), order, runs.order is not None,
                       starts.view(np.int64), np.ascontiguousarray(quantity, dtype=np.float64),
                       np.ascontiguousarray(shortage, dtype=np.bool_), leaf_id, parent_id,
                       group.astype(np.int64), n_groups)
    stamps, values, flags, leaves, parents, rows, sums, flagged = out
    return HistoryRows(stamps.view(starts.dtype), values, flags, leaves, parents, rows, sums, int(flagged))


@njit(cache=True)
def _take_ranges(start, length, order, through, stamps, quantity, shortage, leaf_id, parent_id, group, n_groups):
    """`take_history`'s pass: range r's rows copied (through `order` when `through`), its ids written along
    it, and its quantities added to its group's sum with pandas' steps (`compensated_add`), its shortage rows
    counted."""
    n = 0
    for r in range(len(length)):
        n += length[r]
    out_stamps = np.empty(n, np.int64)
    out_quantity = np.empty(n, np.float64)
    out_shortage = np.empty(n, np.bool_)
    out_leaf = np.empty(n, leaf_id.dtype)
    out_parent = np.empty(n, parent_id.dtype)
    rows = np.zeros(n_groups, np.int64)
    total = np.zeros(n_groups)
    compensation = np.zeros(n_groups)
    flagged = 0
    at = 0
    for r in range(len(length)):
        g = group[r]
        size = length[r]
        for k in range(size):
            i = start[r] + k
            if through:
                i = order[i]
            out_stamps[at + k] = stamps[i]
            out_quantity[at + k] = quantity[i]
            out_shortage[at + k] = shortage[i]
            flagged += shortage[i]
        out_leaf[at:at + size] = leaf_id[r]
        out_parent[at:at + size] = parent_id[r]
        rows[g] += size
        t_g, c_g = total[g], compensation[g]
        for k in range(at, at + size):
            if out_quantity[k] == out_quantity[k]:  # NaN left out, as pandas does
                t_g, c_g = compensated_add(t_g, c_g, out_quantity[k])
        total[g], compensation[g] = t_g, c_g
        at += size
    return out_stamps, out_quantity, out_shortage, out_leaf, out_parent, rows, total, flagged
