"""`Text`: pandera's `str` column type, checked over the whole column at once; a table's validation without copies.

pandera's own `str` check calls `isinstance(cell, str)` once per cell from
Python (`Series.map`), and its coercion copies the column with
`astype(str)`: on the history tables that was most of the validation time
(1.1 million lines, 5-6 s per text column set). `Text` asks pandas'
`infer_dtype` (one pass in C) whether every non-missing cell is a `str`; only
when one is not does it fall back to pandera's per-cell check, so the failing
rows are named exactly as before. A column that already holds only `str`
cells is returned as it is by the coercion (`astype(str)` would return equal
values). The type prints as `str`, so failure cases read `dtype('str')` as
they did.

The not-null check of a `Text` column: pandera asks `Series.hasnans`, which
for an object column tests every cell for each kind of missing value
(`isnaobj`, about three times the time of `infer_dtype`). When `infer_dtype`
without skipping missing cells answers `string`, every cell is a `str`, so
none is missing and the check passes without that pass; otherwise pandera's
own check runs and names the rows (`TextColumnBackend`). While one table
that needs no coercion is validated, each column's answer is asked once and
kept for its type test, dtype check and not-null check.

`validate_table(model, frame)`: what every asset (and the benchmark) calls.
pandera copies the whole frame before coercing it (`inplace=False`: a deep
copy that also consolidates the blocks), then puts each coerced column back
(`frame[column] = ...`, another copy of every column, even one coercion left
as it was). A stage's table mostly holds its model's types already: every
column of the dtype its model names (a `Text` column: only `str` cells, which
coercion returns as they are). Such a table is validated by the model's
schema with coercion off, which then changes nothing and copies nothing;
every check still runs on every row. Any other table is coerced as before,
on a shallow copy validated in place (a new array per coerced column in the
copy; the caller's frame is left as it was).
"""

from __future__ import annotations

import contextvars
import copy
import functools

import numpy as np
import pandas as pd
import pandera.pandas as pa
from pandera import dtypes
from pandera.api.checks import Check
from pandera.api.pandas.components import Column
from pandera.backends.base import CoreCheckResult
from pandera.backends.pandas.checks import PandasCheckBackend
from pandera.backends.pandas.components import ColumnBackend
from pandera.engines import pandas_engine

from pipelines.cell_runs import few_runs, runs_kept
from pipelines.unique_keys import one_proof_per_table

ALL_TEXT = ("string", "empty")  # infer_dtype's answers when every non-missing cell is a str
_FEW = 1024  # rows below which a column is asked whole


def all_text(data, skipna: bool = True) -> bool:
    """True when `data` is an object column whose every non-missing cell is a `str` (every cell: `skipna` False)."""
    if not isinstance(data, pd.Series) or data.dtype != object:
        return False
    return _inferred(data, False) in ALL_TEXT or skipna and _inferred(data, True) in ALL_TEXT


# what infer_dtype said of each column during one validate_table of a table that needs no coercion (nothing is
# written into its columns then): its check, its not-null check and the type test before them ask once
_SEEN: contextvars.ContextVar[dict | None] = contextvars.ContextVar("text_columns_seen", default=None)


def _inferred(data: pd.Series, skipna: bool) -> str:
    seen = _SEEN.get()
    if seen is None:
        return _infer_by_runs(data.values, skipna)
    values = data.values
    key = (values.__array_interface__["data"][0], values.shape, values.strides, skipna)
    if key not in seen:
        seen[key] = _infer_by_runs(values, skipna)
    return seen[key]


def _infer_by_runs(values: np.ndarray, skipna: bool) -> str:
    """`infer_dtype(values, skipna)`, asked of one cell per run of one cell object when the column is in long
    runs (`cell_runs.few_runs`: a key repeated over a leaf's periods): every cell holds the object of its run's
    first cell, so the same type, and the cells asked hold every object of the column."""
    starts = few_runs(values) if len(values) >= _FEW else None
    return pd.api.types.infer_dtype(values if starts is None else values[starts], skipna=skipna)


@pandas_engine.Engine.register_dtype
@dtypes.immutable
class Text(pandas_engine.NpString):
    """A text column: as pandera's `str`, with whole-column check and coercion."""

    def coerce(self, data_container):
        if all_text(data_container):
            return data_container
        return super().coerce(data_container)

    def check(self, pandera_dtype, data_container=None):
        if data_container is not None and all_text(data_container):
            return True
        return super().check(pandera_dtype, data_container)

    def __str__(self) -> str:
        return "str"


class TextColumnBackend(ColumnBackend):
    """pandera's column backend, whose not-null check of a `Text` column of only `str` cells takes one pass."""

    def check_nullable(self, check_obj, schema):
        if not schema.nullable and isinstance(schema.dtype, Text) and all_text(check_obj, skipna=False):
            return CoreCheckResult(passed=True, check="not_nullable")
        return super().check_nullable(check_obj, schema)


class TextCheckBackend(PandasCheckBackend):
    """pandera's check backend, which drops the blanks of a column before a check (`ignore_na`) without asking
    a column of only `str` cells for them (`Series.hasnans` on text: the isin check's largest part), and asks an
    `isin` check of a column in long runs once per run."""

    def preprocess_table_with_key(self, check_obj, key):
        if self.check.groupby is None and all_text(check_obj[key], skipna=False):
            return check_obj[key]  # no blank to drop
        return super().preprocess_table_with_key(check_obj, key)

    def apply_field(self, check_obj):
        """An `isin` check of a column in long runs of one cell object (`cell_runs.few_runs`): asked of each
        run's first cell and spread over the run (one object, one answer), every row's answer as pandera's."""
        values = check_obj.to_numpy() if self.check.name == "isin" and not self.check.element_wise else None
        starts = few_runs(values) if values is not None and values.dtype == object and len(values) >= _FEW else None
        if starts is None:
            return super().apply_field(check_obj)
        first = np.asarray(self.check_fn(pd.Series(values[starts])), dtype=bool)
        return pd.Series(np.repeat(first, np.diff(np.append(starts, len(values)))), index=check_obj.index)


# before pandera registers its own on the first validation (it does not replace a registered backend)
Column.register_backend(pd.DataFrame, TextColumnBackend, force=True)
Check.register_backend(pd.DataFrame, TextCheckBackend, force=True)


def validate_table(model: type[pa.DataFrameModel], frame: pd.DataFrame) -> pd.DataFrame:
    """`model.validate(frame, lazy=True)`: the same checks on every row and the same errors, without copying
    the data when no column needs coercing; `frame` itself is left as it was."""
    schema = model.to_schema()
    token = _SEEN.set({})
    try:
        with one_proof_per_table(), runs_kept():  # the ids' proof made for the unique key is read by ids_match_keys
            if not (schema.coerce and holds_its_types(schema, frame)):
                _SEEN.set(None)  # coercion writes columns: no answer is kept
                with runs_kept(keep=False):
                    return schema.validate(frame.copy(deep=False), lazy=True, inplace=True)
            return _without_coercion(model).validate(frame.copy(deep=False), lazy=True, inplace=True)
    finally:
        _SEEN.reset(token)


def holds_its_types(schema: pa.DataFrameSchema, frame: pd.DataFrame) -> bool:
    """True when coercing `frame` to `schema` would change no column (absent columns aside: the checks report
    them): each column of the dtype its schema names, a `Text` column of `str` cells only."""
    for name, column in schema.columns.items():
        if name not in frame.columns:
            continue
        data = frame[name]
        if isinstance(data, pd.DataFrame):  # a repeated column name: left to pandera
            return False
        if isinstance(column.dtype, Text):
            if not all_text(data):
                return False
        elif column.dtype is None or str(data.dtype) != str(column.dtype):
            return False
    return True


@functools.cache
def _without_coercion(model: type[pa.DataFrameModel]) -> pa.DataFrameSchema:
    schema = copy.deepcopy(model.to_schema())
    schema.coerce = False
    for column in schema.columns.values():
        column.coerce = False
    return schema
