"""Runs of one cell object in object columns, found on the cells' addresses without copying a column.

A key column of a history table repeats one `str` object over each leaf's
periods (the Parquet reader's `deduplicate_objects`, a stage's repeat of its
key table). Two neighbouring cells holding one object hold one text, of one
type, equal to itself; so a column's cells are judged where its object changes
only: `text_codes.run_starts` finds those places a block of rows at a time on
the addresses read in place (no copy, no full-length temporary); `few_runs` gives
them for a column in long runs (kept for the whole validation of a table
inside `runs_kept`, so the type check, the unique key and the ids' proof find
them once); `text_changes` gives where neighbouring cells differ as text,
comparing text only where the object changes.
"""

from __future__ import annotations

import contextlib
import contextvars

import numpy as np
import pandas as pd

from pipelines.text_codes import RUNS_SHARE, run_starts

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
    starts = run_starts([values], most=1 / RUNS_SHARE) if len(values) >= RUNS_SHARE else None
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
