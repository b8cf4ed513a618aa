"""Runs of one cell object in object columns, found on the cells' addresses without copying a column.

A key column of a history table repeats one `str` object over each leaf's
periods (the Parquet reader's `deduplicate_objects`, a stage's repeat of its
key table). Two neighbouring cells holding one object hold one text, of one
type, equal to itself; so a column's cells are judged where its object changes
only: `cell_run_starts` finds those places a block of rows at a time on the
addresses read in place (no copy, no full-length temporary); `few_runs` gives
them for a column in long runs (kept for the whole validation of a table
inside `runs_kept`, so the type check, the unique key and the ids' proof find
them once); `text_changes` gives where neighbouring cells differ as text,
comparing text only where the object changes.
"""

from __future__ import annotations

import contextlib
import contextvars
import ctypes

import numpy as np
import pandas as pd

from pipelines.text_codes import RUNS_SHARE

BLOCK = 1 << 20  # rows compared at a time

# during one validation: the runs of each column asked for, with the column (held, so its address stays its own)
_KEPT: contextvars.ContextVar[dict | None] = contextvars.ContextVar("cell_runs_kept", default=None)


def cell_run_starts(columns: list[np.ndarray], block: int = BLOCK, most: float | None = None) -> np.ndarray | None:
    """Positions where a run of one cell object starts in any of `columns` (object arrays of one length): the
    positions of `text_codes.run_starts`, compared a block of rows at a time on the cells' addresses read in
    place. `most`: None (given up) as soon as the runs found exceed that share of the rows read."""
    n = len(columns[0]) if columns else 0
    if not n:
        return np.zeros(0, dtype=np.int64)
    held = [np.ascontiguousarray(v, dtype=object) for v in columns]  # kept alive while their cells are read
    cells = [np.ctypeslib.as_array((ctypes.c_ssize_t * n).from_address(v.ctypes.data)) for v in held]
    found, change, differ = [np.zeros(1, dtype=np.int64)], np.empty(block, dtype=bool), np.empty(block, dtype=bool)
    count = 1
    for low in range(1, n, block):
        high = min(n, low + block)
        now, other = change[: high - low], differ[: high - low]
        now[:] = False
        for where in cells:
            np.not_equal(where[low:high], where[low - 1 : high - 1], out=other)
            now |= other
        found.append(np.flatnonzero(now) + low)
        count += len(found[-1])
        if most is not None and count > most * high:
            return None
    return np.concatenate(found)


def few_runs(values: np.ndarray) -> np.ndarray | None:
    """`cell_run_starts([values])` of an object column in long runs (at most 1/RUNS_SHARE as many as rows),
    else None; found once per column while `runs_kept` is open."""
    if values.dtype != object:
        return None
    kept = _KEPT.get()
    key = (values.__array_interface__["data"][0], values.shape, values.strides)
    if kept is not None and key in kept:
        return kept[key][1]
    starts = cell_run_starts([values], most=1 / RUNS_SHARE) if len(values) >= RUNS_SHARE else None
    if kept is not None:
        kept[key] = (values, starts)  # the column held: no other array takes its address meanwhile
    return starts


@contextlib.contextmanager
def runs_kept(keep: bool = True):
    """While a table is validated without writing its columns: each column's runs found once (`few_runs`);
    `keep` False: none kept (a coercion may write a column in place)."""
    token = _KEPT.set({} if keep else None)
    try:
        yield
    finally:
        _KEPT.reset(token)


def text_changes(values: np.ndarray) -> np.ndarray:
    """Positions p (from 1) where `values[p] == values[p - 1]` does not hold, for an object array. When its
    cells are in long runs of one `str` object (a key repeated over a leaf's periods), the text is compared only
    where the object changes (one object is one text, equal to itself); otherwise, or when a cell is not a
    `str` (a missing cell differs from itself), cell by cell."""
    starts = few_runs(values)
    if starts is not None and pd.api.types.infer_dtype(values[starts], skipna=False) == "string":
        at = starts[1:]
        return at[~(values[at] == values[at - 1])]
    return np.flatnonzero(~(values[1:] == values[:-1])) + 1
