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
