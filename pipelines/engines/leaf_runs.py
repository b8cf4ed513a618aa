"""A history's rows as one run per leaf in period order, and ranges of those runs.

The history tables hold millions of rows over about a hundred thousand leaves;
a rule decided per leaf (its span, its product's retirement) keeps or drops one
range of each leaf's rows once the rows are read leaf by leaf in period order.
`leaf_runs` reads a frame so, without moving a row when the frame is already
grouped by leaf with ascending periods (as the cleansing stage writes it), else
through one stable sort; `expand` turns ranges into positions; `ranges_taker`
takes a column's rows of the ranges a stage keeps, as slices where the ranges
continue each other (no index of every row: most of a history is kept in its
own order); `span_rows` finds each leaf's rows inside its span by a binary
search of every leaf at once; `grouped_sums` sums a column over runs of one
group as pandas' grouped sum does, without a group code per row.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from numba import njit

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


_LONG = 64  # rows from which a range of a history is copied as one slice rather than gathered row by row


def ranges_taker(runs: LeafRuns, start: np.ndarray, length: np.ndarray):
    """A function of a history column giving its values at the run ranges [start, start + length), one range
    after the other (`expand`'s positions, read through `runs.rows`).

    When the runs are the rows themselves, neighbouring ranges that continue each other are joined, and each
    joined range of at least `_LONG` rows is copied as one slice into the result; the rows of the shorter ones
    are gathered by one index of those rows only. No index of every row is built: a history that keeps most of
    its rows in its own order is copied in a few thousand slices."""
    if runs.order is not None:
        rows = runs.rows(expand(start, length))
        return lambda values: values[rows]
    start, length = start[length > 0], length[length > 0]
    joins = np.ones(len(start), dtype=bool)
    joins[1:] = start[1:] != start[:-1] + length[:-1]  # a range that does not continue the one before starts anew
    head = np.flatnonzero(joins)
    seg_start = start[head]
    seg_length = np.add.reduceat(length, head) if len(head) else length[:0]
    at = np.cumsum(seg_length) - seg_length  # where each joined range lands in the result
    long = seg_length >= _LONG
    slices = list(zip(at[long].tolist(), seg_start[long].tolist(), seg_length[long].tolist(), strict=True))
    short_to = expand(at[~long], seg_length[~long])
    short_from = expand(seg_start[~long], seg_length[~long])
    total = int(seg_length.sum())

    def take(values: np.ndarray) -> np.ndarray:
        out = np.empty(total, dtype=values.dtype)
        for to, frm, n in slices:
            out[to:to + n] = values[frm:frm + n]
        out[short_to] = values[short_from]
        return out

    return take


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


@njit(cache=True)
def grouped_sums(values: np.ndarray, length: np.ndarray, group: np.ndarray, n_groups: int) -> np.ndarray:
    """Per group, the sum of `values` over the runs of rows of that group (`length`: the rows of each run, one
    run after the other; `group`: each run's group), NaN left out: pandas' grouped sum of float64 values
    (`groupby(...).sum()`, whose `group_sum` adds the rows of a group in row order with Kahan's compensation),
    step by step, so the same sums bit for bit, read run by run without a group code per row."""
    total = np.zeros(n_groups)
    compensation = np.zeros(n_groups)
    at = 0
    for r in range(len(length)):
        g = group[r]
        for i in range(at, at + length[r]):
            value = values[i]
            if value == value:
                y = value - compensation[g]
                t = total[g] + y
                compensation[g] = t - total[g] - y
                if compensation[g] != compensation[g]:  # an infinite value: pandas resets the compensation
                    compensation[g] = 0.0
                total[g] = t
        at += length[r]
    return total
