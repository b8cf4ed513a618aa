"""Master data loading: the optional `scale` and `initial_share` columns of customer spans."""

from __future__ import annotations

import pandas as pd
import pandera.errors
import pytest

from pipelines.schemas import CustomerSpans
from pipelines.stages.master_data import load_customer_spans

HEADER = "product,site,customer,active_from,active_to,reference_customer"


def write_spans(folder, text):
    (folder / "customer_spans.csv").write_text(text)
    return load_customer_spans(folder)[0]


def test_spans_without_the_optional_columns_read_as_blank(tmp_path):
    frame = CustomerSpans.validate(write_spans(tmp_path, f"{HEADER}\nP1,S1,C1,,,\nP1,S1,C2,2026-01-05,,C1\n"))
    assert list(frame.columns[-2:]) == ["scale", "initial_share"]
    assert frame["scale"].isna().all() and frame["initial_share"].isna().all()


def test_spans_with_the_optional_columns_are_parsed(tmp_path):
    text = f"{HEADER},scale,initial_share\nP1,S1,C1,,,,,\nP1,S1,C2,2026-01-05,,C1,0.8,\nP1,S1,C3,2026-03-02,,,,0.15\n"
    frame = CustomerSpans.validate(write_spans(tmp_path, text))
    assert frame["scale"].tolist()[1] == 0.8 and frame["initial_share"].tolist()[2] == 0.15
    assert pd.isna(frame["scale"].tolist()[0]) and pd.isna(frame["initial_share"].tolist()[1])


@pytest.mark.parametrize(
    ("cells", "column"),
    [
        (",1.5,", "scale"),  # more than the reference has
        (",0,", "scale"),  # scale must be > 0
        (",,1", "initial_share"),  # a share of 1 would leave the others nothing
        (",,-0.1", "initial_share"),
    ],
)
def test_out_of_range_scale_or_initial_share_is_a_schema_failure_naming_the_column(tmp_path, cells, column):
    frame = write_spans(tmp_path, f"{HEADER},scale,initial_share\nP1,S1,C2,2026-01-05,,C1{cells}\n")
    with pytest.raises(pandera.errors.SchemaErrors) as err:
        CustomerSpans.validate(frame, lazy=True)
    assert set(err.value.failure_cases["column"]) == {column}
