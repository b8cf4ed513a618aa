"""The unique-key check of a table, proven on its integer columns where it can be; pandera's own otherwise.

pandera checks a model's `unique` key with `DataFrame.duplicated`, which
hashes every key column: on `lifecycle_history` (six key columns, four of
them text) that was half of the table's validation. A table that carries
`leaf_id` / `parent_id` (`pipelines.keys`) holds the same key in integers
once its ids match its text keys (`ids_proven`, which the table's
`ids_match_keys` check needs anyway; proven once per validation here and
read by that check): then the leaf key (product, site, customer) is unique
exactly where `leaf_id` is, with the other key columns beside it.

`key_unique` proves a key unique without hashing its text, in one of two
ways, each a pass over neighbouring rows:

- on the ids (`_unique_on_ids`): the ids in place of the text keys they
  stand for, date, integer and flag columns as their integers. When those
  rows are sorted (the stages write them by id and period) the rows that
  share the integer part are neighbours; otherwise they are packed into one
  integer and hashed. Only the rows that share it are then compared on the
  key's other (text) columns.
- on runs (`_unique_by_runs`), for a table without ids grouped by its text
  key (the cleaned history, by leaf): the integer part strictly increases
  along each run of one text key, and no two runs hold the same text key.

Whatever is not proven (duplicates found, ids that do not match, a table in
another order) goes to pandera's own check, which names the failing rows as
before.
"""

from __future__ import annotations

import contextlib
import contextvars

import numpy as np
import pandas as pd
from pandera.api.pandas.container import DataFrameSchema
from pandera.backends.base import CoreCheckResult
from pandera.backends.pandas.container import DataFrameSchemaBackend
from pandera.config import ValidationScope
from pandera.validation_depth import validate_scope

from pipelines.cell_runs import text_changes
from pipelines.keys import LEAF, LEAF_ID, PARENT, PARENT_ID, ids_match_keys, ids_proven, pack_codes

# during one validation: whether a frame's ids were proven to match its keys, by the arrays they were read from
_PROOFS: contextvars.ContextVar[dict | None] = contextvars.ContextVar("ids_proofs", default=None)


@contextlib.contextmanager
def one_proof_per_table():
    """While a table is validated: `ids_proven` computed once for the unique key and the `ids_match_keys` check."""
    token = _PROOFS.set({})
    try:
        yield
    finally:
        _PROOFS.reset(token)


def proven_ids(frame: pd.DataFrame) -> bool:
    """`keys.ids_proven(frame)`, asked once per validation of the same columns."""
    proofs = _PROOFS.get()
    if proofs is None:
        return ids_proven(frame)
    key = tuple(
        (c, frame[c].to_numpy().__array_interface__["data"][0], len(frame))
        for c in (*LEAF, LEAF_ID, PARENT_ID) if c in frame.columns
    )
    if key not in proofs:
        proofs[key] = ids_proven(frame)
    return proofs[key]


def ids_match_keys_checked(frame: pd.DataFrame) -> pd.Series:
    """`keys.ids_match_keys`, reading the proof the unique key made of the same table."""
    if proven_ids(frame):
        return pd.Series(True, index=frame.index)
    return ids_match_keys(frame)


def key_unique(frame: pd.DataFrame, subset: list[str]) -> bool:
    """True when no two rows of `frame` hold the same `subset` key, proven without hashing the text; False: not
    proven (pandera's own check decides)."""
    if frame.columns.has_duplicates:  # a repeated column name: left to pandera, which reports it
        return False
    cols = [c for c in subset if c in frame.columns]
    return len(frame) < 2 or _unique_on_ids(frame, cols) or _unique_by_runs(frame, cols)


def _unique_on_ids(frame: pd.DataFrame, cols: list[str]) -> bool:
    """The key proven unique on the ids in place of the text keys they match (False: no such ids, or not proven)."""
    integers, rest = [], list(cols)
    for id_col, key in ((LEAF_ID, LEAF), (PARENT_ID, PARENT)):
        if set(key) <= set(rest) and id_col in frame.columns and proven_ids(frame):
            integers.append(frame[id_col].to_numpy())  # as stored (int32): no copy
            rest = [c for c in rest if c not in key]
    if not integers:
        return False  # nothing to gain: the text columns would be hashed as pandera does
    for c in list(rest):
        dtype = frame[c].dtype
        if isinstance(dtype, np.dtype) and dtype.kind in "iubMm":  # NaT is one integer: equal to itself, as in pandas
            integers.append(frame[c].to_numpy().view(np.int64) if dtype.kind in "Mm" else frame[c].to_numpy())
            rest.remove(c)
    shared = _rows_sharing(integers, len(frame))
    if shared is None:
        return False
    if not shared.any():
        return True
    if not rest:
        return False
    sub = pd.DataFrame({i: values[shared] for i, values in enumerate(integers)})
    for c in rest:
        sub[c] = frame[c].to_numpy()[shared]
    return not bool(sub.duplicated().any())


def _unique_by_runs(frame: pd.DataFrame, cols: list[str]) -> bool:
    """The key proven unique on a table grouped by its text part (as the cleaned history is, by leaf): the text
    part is constant along runs of neighbouring rows, the integer part strictly increases along each run, and
    the runs' text parts are distinct. Two rows with one key would share a run, where the integer part never
    repeats, or lie in two runs of the same text part. False when the table is not so ordered."""
    text = [c for c in cols if frame[c].dtype == object]
    integers = []
    for c in cols:
        dtype = frame[c].dtype
        if c in text:
            continue
        if not (isinstance(dtype, np.dtype) and dtype.kind in "iubMm"):
            return False  # floats and other types: left to pandera
        integers.append(frame[c].to_numpy().view(np.int64) if dtype.kind in "Mm" else frame[c].to_numpy())
    same = np.ones(len(frame) - 1, dtype=bool)  # row i + 1 continues the run of row i
    for c in text:  # a NaN differs from itself: it starts a run, and equal runs' keys are then duplicated below
        same[text_changes(frame[c].to_numpy(object)) - 1] = False
    later, tie = np.zeros(len(same), dtype=bool), np.ones(len(same), dtype=bool)
    for values in integers:
        later |= tie & (values[1:] > values[:-1])
        tie &= values[1:] == values[:-1]
    if not bool(np.all(later | ~same)):
        return False
    starts = np.flatnonzero(np.r_[True, ~same])
    return not bool(pd.DataFrame({c: frame[c].to_numpy(object)[starts] for c in text}).duplicated().any())


def _rows_sharing(columns: list[np.ndarray], n: int) -> np.ndarray | None:
    """Mask of the rows whose tuple of `columns` another row holds too (None: too wide to pack)."""
    if n < 2:
        return np.zeros(n, dtype=bool)
    same = np.ones(n - 1, dtype=bool)  # row i + 1 equals row i on the columns so far
    later = np.zeros(n - 1, dtype=bool)  # row i + 1 comes after row i (the first column that differs decides)
    for values in columns:
        later |= same & (values[1:] > values[:-1])
        same &= values[1:] == values[:-1]
    shared = np.zeros(n, dtype=bool)
    first = columns[0]
    boundary = first[1:] != first[:-1]  # a new run of the first column (an id) starts at row i + 1
    if bool(np.all(later | same | boundary)):  # sorted along each run of the first column
        # equal tuples are neighbours when the table is sorted, or when no value of the first column is in two
        # runs (its runs out of order: late ids among the others)
        runs = first[np.r_[True, boundary]]
        if bool(np.all(later | same)) or not pd.Series(runs).duplicated().any():
            shared[1:] |= same
            shared[:-1] |= same
            return shared
    codes, widths = [], []
    for values in columns:
        low = int(values.min())
        width = int(values.max()) - low + 1
        if width > n:  # sparse values (dates in nanoseconds): dense codes by hashing
            code, uniques = pd.factorize(values)
            codes.append(code)
            widths.append(len(uniques))
        else:
            codes.append(values.astype(np.int64) - low)
            widths.append(width)
    packed = pack_codes(codes, widths)
    return None if packed is None else pd.Series(packed).duplicated(keep=False).to_numpy()


class KeyedFrameBackend(DataFrameSchemaBackend):
    """pandera's pandas frame backend whose unique-key check is first tried on integers (`key_unique`)."""

    @validate_scope(scope=ValidationScope.DATA)
    def check_column_values_are_unique(self, check_obj: pd.DataFrame, schema) -> CoreCheckResult:
        keys = schema.unique or []
        keys = [keys] if all(isinstance(k, str) for k in keys) else keys
        if keys and all(key_unique(check_obj, list(k)) for k in keys):
            return CoreCheckResult(passed=True, check="multiple_fields_uniqueness")
        return super().check_column_values_are_unique(check_obj, schema)


# before pandera registers its own on the first validation (it does not replace a registered backend)
DataFrameSchema.register_backend(pd.DataFrame, KeyedFrameBackend, force=True)
