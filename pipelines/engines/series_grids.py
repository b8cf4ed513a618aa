"""Dense history of many series at once: each series' periods from its first demand to the cycle, zeros filled.

`series_grid` is what `pipelines.engines.models` fits and classifies; the forecast stage, the backtest's origins,
the upper levels and the period shares lay their series out with it. `history_grid` lays out a history's rows
per row of a table of leaves or parents: through the integer ids both carry, a weekly history is summed by a
compiled pass (numba) straight from its id and period start columns, with no code or ordinal per row.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from numba import njit

from pipelines.calendar import EPOCH_MONDAY_NS, WEEK_NS, period_ordinal
from pipelines.keys import LEAF, LEAF_ID, PARENT_ID, ids_in, rows_in


@dataclass(frozen=True)
class SeriesGrid:
    """Dense history of n series, each from its first non-zero period to the period before the cycle.

    `series`, `ordinal`, `y` are aligned long arrays; a series without demand has no rows.
    """

    series: np.ndarray
    ordinal: np.ndarray
    y: np.ndarray
    n_series: int


def series_grid(code: np.ndarray, ordinal: np.ndarray, qty: np.ndarray, n_series: int, end_ord: int) -> SeriesGrid:
    """Sum rows per (series, period) and lay each series out densely with zeros filled."""
    keep = ordinal < end_ord
    if not keep.all():  # the history rows are mostly all before the cycle: no copy then
        code, ordinal, qty = code[keep], ordinal[keep], qty[keep]
    start = int(ordinal.min()) if len(ordinal) else end_ord
    if len(code) and n_series * (end_ord - start) <= 2 * len(code) + DENSE_CELLS:
        return _dense_series_grid(code, ordinal, qty, n_series, start, end_ord)
    first = np.full(n_series, end_ord, dtype=np.int64)
    np.minimum.at(first, code, np.where(qty > 0, ordinal, end_ord))
    length = end_ord - first
    offset = np.concatenate([[0], np.cumsum(length)[:-1]])
    series = np.repeat(np.arange(n_series), length)
    ords = np.arange(len(series)) + (first - offset)[series]
    cell = (offset - first)[code]  # few arrays of the history's length: each new one costs more than its arithmetic
    cell += ordinal  # each row's place in the grid
    inside = ordinal >= first[code]  # rows before a series' first demand are left out (+0.0 to cell 0)
    weights = qty if inside.all() else np.where(inside, qty, 0.0)
    if not inside.all():
        cell *= inside
    y = np.bincount(cell, weights=weights, minlength=len(series)) if len(series) else np.zeros(0)
    return SeriesGrid(series=series, ordinal=ords, y=y, n_series=n_series)


# `series_grid` sums on a dense series x period block when that block holds at most twice the rows plus this many
# cells: two passes of bincount over the rows, no scattered minimum and no gathers per row (measured here)
DENSE_CELLS = 4_000_000


def _dense_series_grid(
    code: np.ndarray, ordinal: np.ndarray, qty: np.ndarray, n_series: int, start: int, end_ord: int
) -> SeriesGrid:
    """`series_grid` through a dense (n_series, end_ord - start) block: each cell's rows summed in row order (as
    the grid's cells sum them), a series starting at its first period with a row of positive quantity."""
    width = end_ord - start
    cell = code * width
    cell += ordinal
    cell -= start
    size = n_series * width
    total = np.bincount(cell, weights=qty, minlength=size).reshape(n_series, width)
    positive = np.bincount(cell[qty > 0], minlength=size).reshape(n_series, width) > 0
    return _block_grid(total, positive, start)


def _block_grid(total: np.ndarray, positive: np.ndarray, start: int) -> SeriesGrid:
    """The grid of a dense (n_series, width) block of sums whose first column is period `start`; `positive`:
    the cells holding a row of positive quantity."""
    n_series, width = total.shape
    first = np.where(positive.any(axis=1), positive.argmax(axis=1), width)  # column of each series' first demand
    length = width - first
    series = np.repeat(np.arange(n_series), length)
    ords = np.arange(len(series)) + (start + first - np.concatenate([[0], np.cumsum(length)[:-1]]))[series]
    y = total[np.arange(width)[None, :] >= first[:, None]]  # series-major, each series' periods in order
    return SeriesGrid(series=series, ordinal=ords, y=y, n_series=n_series)


def history_grid(
    history: pd.DataFrame,
    table: pd.DataFrame,
    cols: list[str],
    end_ord: int,
    period: str,
    keep: np.ndarray | None = None,
) -> SeriesGrid:
    """`series_grid` of the history's `quantity` per row of `table` (its leaves, `cols` = LEAF, or parents, the
    parent key), a series per row of `table` (`keep`: a mask over them, the others left without rows).

    The history's rows are placed as `keys.rows_in` and `calendar.period_ordinal` place them. Where both frames
    carry the integer id of the key and the history's periods are weeks as nanoseconds, one compiled pass sums
    the rows into a dense series x period block from the history's first period (each cell's rows in row order,
    as `series_grid` sums them: the same grid bit for bit), with no array of the history's length made;
    elsewhere, or when that block would be large (`DENSE_CELLS`), the rows are coded and `series_grid` lays them
    out.
    """
    n_series = len(table)
    qty = history["quantity"].to_numpy(float)
    id_col = LEAF_ID if cols == LEAF else PARENT_ID
    starts = history["period_start"].to_numpy()
    if period == "week" and starts.dtype == "datetime64[ns]" and ids_in(history, (id_col,)) and ids_in(
        table, (id_col,)
    ) and history[id_col].dtype.kind in "iu":  # (ids stored as floats are coded as `rows_in` codes them)
        held = table[id_col].to_numpy(np.int64)
        series_of_id = np.full(int(held.max()) + 1 if len(held) else 0, -1, dtype=np.int64)
        series_of_id[held] = np.arange(n_series)
        if keep is not None:
            series_of_id[held[~keep]] = -1
        first = starts.min() if len(starts) else np.datetime64("NaT")  # NaT when any start is NaT
        # the block starts at the history's first period (a series' grid starts at its first demand, so an earlier
        # start than the laid-out rows' own changes no value); without NaT, the ordinals are floor divisions
        start = end_ord if np.isnat(first) else int(period_ordinal(pd.DatetimeIndex([first]), period)[0])
        if start < end_ord and n_series * (end_ord - start) <= 2 * len(starts) + DENSE_CELLS:
            sums = _block_sums(series_of_id, history[id_col].to_numpy(), starts.view(np.int64), qty, start, end_ord,
                               n_series)
            return _block_grid(*sums, start)
    code = rows_in(history, table, cols)
    ok = code >= 0
    if keep is not None and len(keep):
        ok &= keep[np.maximum(code, 0)]
    ords = period_ordinal(history["period_start"], period)
    if ok.all():
        return series_grid(code, ords, qty, n_series, end_ord)
    return series_grid(code[ok], ords[ok], qty[ok], n_series, end_ord)


@njit(cache=True)
def _block_sums(series_of_id, ids, ns, qty, start, end_ord, n_series):
    """(total, positive), each (n_series, end_ord - start): the rows' quantities summed per cell in row order
    (`np.bincount`'s order), and whether a cell holds a row of positive quantity."""
    width = end_ord - start
    total = np.zeros(n_series * width)
    positive = np.zeros(n_series * width, dtype=np.bool_)
    n_map = len(series_of_id)
    for i in range(len(ids)):
        k = ids[i]
        if k < 0 or k >= n_map or series_of_id[k] < 0:
            continue
        o = (ns[i] - EPOCH_MONDAY_NS) // WEEK_NS
        if o >= end_ord or o < start:  # (none before `start`, the history's first period: a guard)
            continue
        cell = series_of_id[k] * width + (o - start)
        total[cell] += qty[i]
        if qty[i] > 0:
            positive[cell] = True
    return total.reshape(n_series, width), positive.reshape(n_series, width)
