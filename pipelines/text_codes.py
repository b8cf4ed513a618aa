"""Integer codes of text columns, hashing as few cells as the column allows.

A text column of a history table holds a few thousand distinct keys over
millions of rows, and its cells mostly share their objects: the Parquet reader
(`to_pandas(deduplicate_objects=True)`) and a stage's own `take` of a key table
(`leaves.iloc[leaf_code]`) give every row of one key the same `str` object.
`pd.factorize` hashes every cell and compares it with the hashed table; here
the cells' object addresses (integers, one machine word each) are compared
first, and only the cells where the address changes (the starts of runs of one
object) or, when runs are short, one cell per distinct object, are hashed as
text. Equal addresses are the same object, hence equal text; two distinct
objects of equal text are still told equal by the text hashing, so the codes
are exactly `pd.factorize`'s: numbered by first appearance, missing cells -1
(or their own code with `use_na_sentinel=False`).
"""

from __future__ import annotations

import ctypes

import numpy as np
import pandas as pd

RUNS_SHARE = 4  # hash the run starts when there are at most 1/RUNS_SHARE as many runs as rows
RUN_BLOCK = 1 << 20  # rows compared at a time by `run_starts`
OBJECTS_SHARE = 64  # read the distinct objects at their addresses when there are at most 1/OBJECTS_SHARE as many


def addresses(values: np.ndarray, copy: bool = True) -> np.ndarray:
    """The address of each cell's object of an object array (int64 per cell; a copy, so it outlives `values`).

    `copy=False`: the cells' pointers read in place, without copying them, when `values` is a contiguous
    object array already - valid only while `values` lives, for a caller that holds it meanwhile."""
    contiguous = np.ascontiguousarray(values, dtype=object)
    if not len(contiguous):
        return np.zeros(0, dtype=np.int64)
    cells = np.ctypeslib.as_array((ctypes.c_int64 * len(contiguous)).from_address(contiguous.ctypes.data))
    return cells.copy() if copy or contiguous is not values else cells


def run_starts(columns: list[np.ndarray], block: int = RUN_BLOCK, most: float | None = None) -> np.ndarray | None:
    """Positions where a run of equal cell objects starts in any of `columns` (object arrays of one length),
    compared `block` rows at a time on the cells' addresses read in place (no copy, no full-length temporary).
    `most`: None (given up) as soon as the runs found exceed that share of the rows read."""
    n = len(columns[0]) if columns else 0
    if not n:
        return np.zeros(0, dtype=np.int64)
    held = [np.ascontiguousarray(v, dtype=object) for v in columns]  # kept alive while their cells are read
    cells = [addresses(v, copy=False) for v in held]
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


def first_appearances(codes: np.ndarray) -> np.ndarray:
    """The row of each code's first appearance, for codes 0, 1, ... numbered by first appearance (as
    `pd.factorize` numbers them, no missing code): a code is new exactly where their running maximum rises."""
    if not len(codes):
        return np.zeros(0, dtype=np.int64)
    seen = np.maximum.accumulate(codes)
    return np.flatnonzero(np.r_[True, seen[1:] > seen[:-1]])


def codes_of(values, use_na_sentinel: bool = True) -> tuple[np.ndarray, np.ndarray]:
    """`pd.factorize(values)` as (int64 codes, uniques array), for an object column without hashing every cell."""
    values = values.to_numpy() if isinstance(values, pd.Series | pd.Index) else np.asarray(values)
    n = len(values)
    if values.dtype != object or n < 1024:
        codes, uniques = pd.factorize(values, use_na_sentinel=use_na_sentinel)
        return codes.astype(np.int64, copy=False), np.asarray(uniques)
    where = addresses(values, copy=False)  # `values` is held till the codes are made
    change = np.ones(n, dtype=bool)
    np.not_equal(where[1:], where[:-1], out=change[1:])
    if np.count_nonzero(change) * RUNS_SHARE <= n:  # counted first: short runs need no list of their starts
        starts = np.flatnonzero(change)
        codes, uniques = pd.factorize(values[starts], use_na_sentinel=use_na_sentinel)
        return np.repeat(codes.astype(np.int64), np.diff(np.append(starts, n))), np.asarray(uniques)
    object_code, objects = pd.factorize(where)
    if len(objects) * OBJECTS_SHARE <= n:  # few objects: each read at its address, no pass for first appearances
        firsts = objects_at(objects)
    else:
        firsts = values[first_appearances(object_code)]
    codes, uniques = pd.factorize(firsts, use_na_sentinel=use_na_sentinel)
    codes = codes.astype(np.int64)
    if np.array_equal(codes, np.arange(len(codes))):  # each object a new text: the text codes are the objects'
        return object_code.astype(np.int64, copy=False), np.asarray(uniques)
    return codes[object_code], np.asarray(uniques)


def objects_at(where: np.ndarray) -> np.ndarray:
    """The objects at the addresses `where` (`addresses` of cells of an array the caller still holds), in order:
    each object itself, as the cell holding it would give it."""
    out = np.empty(len(where), dtype=object)
    for i, address in enumerate(where.tolist()):
        out[i] = ctypes.cast(address, ctypes.py_object).value
    return out
