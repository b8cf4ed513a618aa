"""Compiled passes over a class's long history for the report's charts (numba): sums per parent and period.

One pass sums every kept row (period start in [low, high)) into its parent's
cell of a small (parents x periods) matrix and into its parent's total, with
the compensated (Kahan) summation of pandas' group sum (`group_sum` in
pandas/_libs/groupby.pyx: y = value - c; t = sum + y; c = (t - sum) - y, c
reset to 0 where it is NaN, as for an infinite value; NaN values skipped),
rows in their order. The same float64 operations in the same order give the
same numbers bit for bit as `Series.groupby(key).sum()` over the kept rows,
without a key array, a mask or a copy of any column as long as the history.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from pipelines.engines.compensated import compensated_add

NAT = np.iinfo(np.int64).min  # datetime64's NaT as int64: never kept
DAY_NS = 86_400_000_000_000


@njit(cache=True)
def kept_span(starts, low, high):
    """(first, last, count) of the kept period starts (int64 ns, `low <= s < high`, NaT never kept)."""
    first, last, n = high, low, 0
    for i in range(len(starts)):
        s = starts[i]
        if s == NAT or s < low or s >= high:
            continue
        n += 1
        if s < first:
            first = s
        if s > last:
            last = s
    return first, last, n


@njit(cache=True, inline="always")
def _units(d, unit):
    """d / unit for d >= 0 a whole number of units, else -1. A day is divided as the constant it is (a multiply
    and a shift where a division by a run-time value takes tens of cycles: the passes' main cost per row)."""
    if unit == DAY_NS:
        return d // DAY_NS if d % DAY_NS == 0 else -1
    if unit == 1:
        return d
    return d // unit if d % unit == 0 else -1


@njit(cache=True)
def mark(codes, starts, low, high, keys, first, unit, seen, first_row, last_row):
    """For each kept row (low <= start < high, NaT never kept): seen[(key - first) // unit] = True, and the row's
    position in first_row[code] when its parent code has none yet, in last_row[code] always (the code's last kept
    row). False, at once, when a kept row's key is not a whole number of units after `first` (the caller then
    numbers the periods otherwise)."""
    for i in range(len(codes)):
        s = starts[i]
        code = codes[i]
        if code < 0 or s == NAT or s < low or s >= high:
            continue
        d = _units(keys[i] - first, unit)
        if d < 0:
            return False
        seen[d] = True
        if first_row[code] < 0:
            first_row[code] = i
        last_row[code] = i
    return True


@njit(cache=True)
def parent_period_sums(codes, dense, starts, low, high, keys, first, unit, slot_of, values):
    """Sums of the kept rows per (parent, period) and per parent, and the row count per (parent, period).

    codes: (rows,) a parent code per row (an id or a position), `dense[code]` its parent's row in the output
    (-1: row left out); the period's column slot_of[(key - first) // unit], keys: the period starts themselves
    (unit a day) or their codes (unit 1). Returns (cells (parents, periods) float64, rows (parents, periods)
    int64, totals (parents,) float64).
    """
    n_parents = int(dense.max()) + 1 if len(dense) else 0
    n_periods = int(slot_of.max()) + 1 if len(slot_of) else 0
    cells = np.zeros((n_parents, n_periods))
    cell_c = np.zeros((n_parents, n_periods))
    rows = np.zeros((n_parents, n_periods), dtype=np.int64)
    totals = np.zeros(n_parents)
    total_c = np.zeros(n_parents)
    for i in range(len(codes)):
        code = codes[i]
        s = starts[i]
        if code < 0 or code >= len(dense) or s == NAT or s < low or s >= high:
            continue
        p = dense[code]
        if p < 0:
            continue
        j = slot_of[_units(keys[i] - first, unit)]
        rows[p, j] += 1
        v = values[i]
        if v != v:  # NaN: a row of the cell, not summed
            continue
        cells[p, j], cell_c[p, j] = compensated_add(cells[p, j], cell_c[p, j], v)
        totals[p], total_c[p] = compensated_add(totals[p], total_c[p], v)
    return cells, rows, totals


@njit(cache=True)
def code_sums(codes, dense, starts, low, high, values):
    """Per parent (`dense[code]`, -1 left out), the compensated sum of the rows with `low <= start < high`."""
    n_parents = int(dense.max()) + 1 if len(dense) else 0
    totals = np.zeros(n_parents)
    comp = np.zeros(n_parents)
    for i in range(len(codes)):
        code = codes[i]
        if code < 0 or code >= len(dense):
            continue
        p = dense[code]
        s = starts[i]
        if p < 0 or s == NAT or s < low or s >= high:
            continue
        v = values[i]
        if v != v:
            continue
        totals[p], comp[p] = compensated_add(totals[p], comp[p], v)
    return totals


@njit(cache=True)
def rows_of(codes, wanted, starts, low, high, lo, hi):
    """Positions of the rows whose code is `wanted` (bool per code) and whose start is in [low, high), in order,
    looked for in rows lo <= i < hi only (a span known to hold them all)."""
    n = 0
    for i in range(lo, hi):
        code = codes[i]
        s = starts[i]
        if 0 <= code < len(wanted) and wanted[code] and s != NAT and low <= s < high:
            n += 1
    out = np.empty(n, dtype=np.int64)
    k = 0
    for i in range(lo, hi):
        code = codes[i]
        s = starts[i]
        if 0 <= code < len(wanted) and wanted[code] and s != NAT and low <= s < high:
            out[k] = i
            k += 1
    return out


def rows_in_spans(codes, wanted, starts, window, first, last) -> np.ndarray:
    """`rows_of` over the spans [first[k], last[k]] of rows known to hold all the wanted rows (each parent's first
    and last kept row), merged where they overlap and looked through in order: the same positions, in order,
    as one look through every row (one short span per parent where the history is by parent)."""
    order = np.argsort(first, kind="stable")
    spans: list[list[int]] = []
    for lo, hi in zip(np.asarray(first)[order].tolist(), (np.asarray(last)[order] + 1).tolist(), strict=True):
        if spans and lo <= spans[-1][1]:
            spans[-1][1] = max(spans[-1][1], hi)
        else:
            spans.append([lo, hi])
    found = [rows_of(codes, wanted, starts, window[0], window[1], lo, hi) for lo, hi in spans]
    return np.concatenate(found) if found else np.zeros(0, dtype=np.int64)


@njit(cache=True)
def present_sums(cells, present):
    """(row sums (rows,), column sums (columns,)) of the cells where `present`, each with pandas' compensated group
    sum: a row's over its columns left to right, a column's over the rows top down; 0 where none is present. As
    `groupby(row)[...].sum()` and `groupby(column)[...].sum()` over the present cells listed row by row."""
    n_rows, n_cols = cells.shape
    row_sums = np.zeros(n_rows)
    col_sums = np.zeros(n_cols)
    col_c = np.zeros(n_cols)
    for i in range(n_rows):
        total, comp = 0.0, 0.0
        for j in range(n_cols):
            if not present[i, j]:
                continue
            v = cells[i, j]
            if v != v:
                continue
            total, comp = compensated_add(total, comp, v)
            col_sums[j], col_c[j] = compensated_add(col_sums[j], col_c[j], v)
        row_sums[i] = total
    return row_sums, col_sums
