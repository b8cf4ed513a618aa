"""Runs of one cell object in object columns, found on the cells' addresses without copying a column.

A key column of a history table repeats one `str` object over each leaf's
periods (the Parquet reader's `deduplicate_objects`, a stage's repeat of its
key table). Two neighbouring cells holding one object hold one text, of one
type, equal to itself; so a column's cells are judged where its object changes
only: `text_codes.run_starts` finds those places a block of rows at a time on
the addresses read in place (no copy, no full-length temporary); `few_runs` gives
them for a column in long runs, kept for the whole validation of a table
inside `runs_kept`, so the type check, the unique key and the ids' proof find
them once (`object_run_starts`: one compiled pass over the addresses, numba,
with `run_starts`' blocks and its giving up on too many runs); `text_changes`
gives where neighbouring cells differ as text, comparing text only where the
object changes.
"""

from __future__ import annotations

import contextlib
import contextvars

import numpy as np
import pandas as pd
from numba import njit

from pipelines.text_codes import RUN_BLOCK, RUNS_SHARE, addresses

# during one validation: the runs of each column asked for, with the column (held, so its address stays its own)
_KEPT: contextvars.ContextVar[dict | None] = contextvars.ContextVar("cell_runs_kept", default=None)


def few_runs(values: np.ndarray) -> np.ndarray | None:
    """`text_codes.run_starts([values])` of an object column in long runs (at most 1/RUNS_SHARE as many as rows),
    else None; found once per column while `runs_kept` is open."""
    if values.dtype != object:
        return None
    kept = _KEPT.get()
    key = (values.__array_interface__["data"][0], values.shape, values.strides)
    if kept is not None and key in kept:
        return kept[key][1]
    starts = object_run_starts(values, 1 / RUNS_SHARE) if len(values) >= RUNS_SHARE else None
    if kept is not None:
        kept[key] = (values, starts)  # the column held: no other array takes its address meanwhile
    return starts


def object_run_starts(values: np.ndarray, most: float, block: int = RUN_BLOCK) -> np.ndarray | None:
    """`text_codes.run_starts([values], block, most)` of one object column: where a run of one cell object
    starts, None when the runs exceed `most` of the rows read at the end of a block; one compiled pass over the
    cells' addresses (read in place while `held` lives) instead of numpy's passes per block."""
    held = np.ascontiguousarray(values, dtype=object)
    if not len(held):
        return np.zeros(0, dtype=np.int64)
    starts, complete = _object_changes(addresses(held, copy=False), block, most)
    return starts if complete else None


@njit(cache=True)
def _object_changes(cells, block, most):
    """Positions (from 0) where `cells[p] != cells[p - 1]`, block by block; (nothing, False) as soon as their
    count exceeds `most` times the rows read at the end of a block."""
    n = len(cells)
    out = np.empty(min(n, int(most * n) + block + 1), np.int64)  # a block adds at most `block` to a count kept
    out[0] = 0
    count = 1
    for low in range(1, n, block):
        high = min(n, low + block)
        for i in range(low, high):
            if cells[i] != cells[i - 1]:
                out[count] = i
                count += 1
        if count > most * high:
            return out[:0].copy(), False
    return out[:count].copy(), True


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
