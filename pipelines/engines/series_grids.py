"""Dense history of many series at once: each series' periods from its first demand to the cycle, zeros filled.

`series_grid` is what `pipelines.engines.models` fits and classifies; the forecast stage, the backtest's origins,
the upper levels and the period shares lay their series out with it.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


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
    first = np.where(positive.any(axis=1), positive.argmax(axis=1), width)  # column of each series' first demand
    length = width - first
    series = np.repeat(np.arange(n_series), length)
    ords = np.arange(len(series)) + (start + first - np.concatenate([[0], np.cumsum(length)[:-1]]))[series]
    y = total[np.arange(width)[None, :] >= first[:, None]]  # series-major, each series' periods in order
    return SeriesGrid(series=series, ordinal=ords, y=y, n_series=n_series)
