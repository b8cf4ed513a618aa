"""`Text` (pipelines/text_dtype.py) against pandera's own `str` column type (reference library: pandera).

Both must accept and refuse the same columns and name the same failing rows;
`Text` only answers whole text columns faster.
"""

import numpy as np
import pandas as pd
import pandera.pandas as pa
import pytest
from pandera.typing import Series

from pipelines.text_dtype import Text, all_text


class WithText(pa.DataFrameModel):
    code: Series[Text] = pa.Field(nullable=True)

    class Config:
        coerce = True


class WithStr(pa.DataFrameModel):
    code: Series[str] = pa.Field(nullable=True)

    class Config:
        coerce = True


class Strict(pa.DataFrameModel):  # no coercion: the dtype check itself must catch a non-text cell
    code: Series[Text]


def failures(model, frame) -> list[tuple]:
    try:
        model.validate(frame, lazy=True)
    except pa.errors.SchemaErrors as err:
        return sorted(err.failure_cases[["check", "index"]].astype(str).itertuples(index=False))
    return []


@pytest.mark.parametrize(
    "cells",
    [
        ["a", "b", ""],
        ["a", None, "c"],
        ["a", np.nan, "c"],
        ["a", 3, 4.5],  # coerced to text by both
        [np.str_("a"), "b"],
    ],
)
def test_same_outcome_as_pandera_str(cells):
    frame = pd.DataFrame({"code": pd.Series(cells, dtype=object)})
    assert failures(WithText, frame) == failures(WithStr, frame)
    if not failures(WithStr, frame):
        pd.testing.assert_frame_equal(WithText.validate(frame), WithStr.validate(frame))


def test_non_text_cell_is_named_by_row():
    frame = pd.DataFrame({"code": pd.Series(["a", "b", 7, "d", b"x"], dtype=object)})
    cases = failures(Strict, frame)
    assert cases, "a number and bytes in a text column must fail"
    assert ("dtype('str')", "2") in cases and ("dtype('str')", "4") in cases
    assert all(index in ("2", "4") for _, index in cases)


def test_all_text_needs_every_cell_a_str():
    assert all_text(pd.Series(["a", None, "b"], dtype=object))
    assert not all_text(pd.Series(["a", 1], dtype=object))
    assert not all_text(pd.Series(["a"], dtype="string"))  # not an object column: pandera's own path


# ------------------------------------------------------------------ not-null check and validate_table
class Required(pa.DataFrameModel):
    code: Series[Text]

    class Config:
        coerce = True


class RequiredStr(pa.DataFrameModel):
    code: Series[str]

    class Config:
        coerce = True


@pytest.mark.parametrize("cells", [["a", "b"], ["a", None, "c"], ["a", "b", np.nan], ["x"] * 999 + [None], []])
def test_not_null_check_of_text_as_pandera_str(cells):
    """A required text column: a blank cell anywhere (here also the last of 1,000) fails as with pandera's str."""
    frame = pd.DataFrame({"code": pd.Series(cells, dtype=object)})
    assert failures(Required, frame) == failures(RequiredStr, frame)
    assert bool(failures(Required, frame)) == any(c is None or c is np.nan for c in cells)


class Mixed(pa.DataFrameModel):
    code: Series[Text] = pa.Field(isin=["a", "b", "c"])
    note: Series[Text] = pa.Field(nullable=True)
    day: Series[pa.DateTime]
    value: Series[float] = pa.Field(ge=0)
    count: Series[int]
    flag: Series[bool]

    class Config:
        coerce = True
        strict = True
        unique = ["code", "day"]


def typed_frame() -> pd.DataFrame:
    return pd.DataFrame(
        {
            "code": pd.Series(["a", "b", "c"], dtype=object),
            "note": pd.Series(["x", None, "z"], dtype=object),
            "day": pd.to_datetime(["2026-11-30", "2026-12-07", "2026-12-14"]),
            "value": [1.0, 2.5, 0.0],
            "count": np.array([1, 2, 3], dtype=np.int64),
            "flag": [True, False, True],
        }
    )


def table_failures(frame) -> list[tuple]:
    from pipelines.text_dtype import validate_table

    try:
        validate_table(Mixed, frame)
    except pa.errors.SchemaErrors as err:
        return sorted(err.failure_cases[["column", "check", "index"]].astype(str).itertuples(index=False))
    return []


def model_failures(frame) -> list[tuple]:
    try:
        Mixed.validate(frame, lazy=True)
    except pa.errors.SchemaErrors as err:
        return sorted(err.failure_cases[["column", "check", "index"]].astype(str).itertuples(index=False))
    return []


def _broken(change) -> pd.DataFrame:
    frame = typed_frame()
    change(frame)
    return frame


CASES = {
    "typed": lambda f: None,
    "count as float (coerced)": lambda f: f.__setitem__("count", f["count"].astype(float)),
    "day as text (coerced)": lambda f: f.__setitem__("day", f["day"].dt.strftime("%Y-%m-%d").astype(object)),
    "a number in a text column (coerced)": lambda f: f.__setitem__("code", pd.Series(["a", "b", 3], dtype=object)),
    "blank required text": lambda f: f.__setitem__("code", pd.Series(["a", None, "c"], dtype=object)),
    "value out of range": lambda f: f.__setitem__("value", [1.0, -1.0, 0.0]),
    "value not a number": lambda f: f.__setitem__("value", pd.Series([1.0, "x", 0.0], dtype=object)),
    "duplicate key": lambda f: f.__setitem__("code", pd.Series(["a", "a", "a"], dtype=object)) or f.__setitem__(
        "day", pd.to_datetime(["2026-11-30"] * 3)),
    "extra column": lambda f: f.__setitem__("other", 1),
    "missing column": lambda f: f.drop(columns="flag", inplace=True),
}


@pytest.mark.parametrize("case", sorted(CASES))
def test_validate_table_as_the_models_own_validate(case):
    """validate_table (no copy; coercion off when nothing needs it) against pandera's model.validate: the same
    failures by column, check and row, the same validated frame, and the caller's frame left as it was."""
    from pipelines.text_dtype import validate_table

    frame = _broken(CASES[case])
    before = frame.copy(deep=True)
    assert table_failures(frame) == model_failures(frame)
    if not model_failures(frame):
        pd.testing.assert_frame_equal(validate_table(Mixed, frame), Mixed.validate(frame))
    pd.testing.assert_frame_equal(frame, before)
    assert list(frame.dtypes) == list(before.dtypes)


def test_holds_its_types_only_when_coercion_would_change_nothing():
    from pipelines.text_dtype import holds_its_types

    schema = Mixed.to_schema()
    assert holds_its_types(schema, typed_frame())
    assert not holds_its_types(schema, _broken(CASES["count as float (coerced)"]))
    assert not holds_its_types(schema, _broken(CASES["day as text (coerced)"]))
    assert not holds_its_types(schema, _broken(CASES["a number in a text column (coerced)"]))
    assert holds_its_types(schema, _broken(CASES["blank required text"]))  # no coercion; the not-null check fails it


@pytest.mark.parametrize("planted", ["nothing", "None", "NaN", "a number", "bytes"])
def test_a_long_column_in_runs_is_judged_as_with_pandera_str(planted):
    """5,000 cells in runs of one `str` object (judged on one cell per run, `cell_runs.few_runs`), a cell planted
    alone inside a run and a run of three planted: the same failures, named by row, as pandera's `str` (or none)."""
    cell = {"nothing": None, "None": None, "NaN": np.nan, "a number": 7, "bytes": b"x"}[planted]
    values = np.repeat(np.array(["a", "b", "c"], dtype=object), [2000, 1500, 1500])
    if planted != "nothing":
        values[1234] = cell
        values[3998:4001] = np.array([cell] * 3, dtype=object)
    frame = pd.DataFrame({"code": values})
    assert all_text(frame["code"], skipna=False) == (planted == "nothing")
    assert failures(Required, frame) == failures(RequiredStr, frame)  # coerced: a number or bytes become text
    assert bool(failures(Required, frame)) == (planted in ("None", "NaN"))
    assert failures(Strict, frame) == failures(StrictStr, frame)
    assert bool(failures(Strict, frame)) == (planted != "nothing")


class StrictStr(pa.DataFrameModel):
    code: Series[str]


class Coded(pa.DataFrameModel):
    code: Series[Text] = pa.Field(isin=["a", "b", "c"], nullable=True)


@pytest.mark.parametrize("planted", ["nothing", "z", "None", "3"])
def test_isin_on_a_long_column_in_runs_names_the_rows_pandas_isin_refuses(planted):
    """5,000 cells in runs of one object (the isin check asked once per run): the failing rows are exactly those
    `Series.isin` refuses (reference: pandas, cell by cell), a value planted alone and as a run of three; a blank
    is let through (nullable), as pandera's ignore_na does."""
    cell = {"nothing": None, "z": "z", "None": None, "3": "3"}[planted]
    values = np.repeat(np.array(["a", "b", "c"], dtype=object), [2000, 1500, 1500])
    if planted != "nothing":
        values[1234] = cell
        values[3998:4001] = np.array([cell] * 3, dtype=object)
    frame = pd.DataFrame({"code": values})
    refused = frame["code"].notna() & ~frame["code"].isin(["a", "b", "c"])
    named = sorted(int(index) for check, index in failures(Coded, frame) if check.startswith("isin"))
    assert named == np.flatnonzero(refused.to_numpy()).tolist()
    assert bool(named) == (planted in ("z", "3"))
