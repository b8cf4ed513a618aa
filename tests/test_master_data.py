"""Master data: the optional `scale` and `initial_share` columns of customer spans, and `references_known`."""

from __future__ import annotations

import shutil
from pathlib import Path

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


# ----------------------------------------------------------------- references_known, through the stage runs
BASE = Path(__file__).parent / "bad_inputs" / "base"
MEASURES = ("statistical_forecast", "planner_adjustment")


def _input_run(folder: Path, name: str, product_class: str):
    """The input stage `name` run as its asset runs it (class `product_class` of the corpus's small master)."""
    from pipelines.engines.class_rows import InputSettings
    from pipelines.stages import master_data as stage

    settings = InputSettings(folder, product_class, ("a", "b"), measures=MEASURES)
    class_map = stage.run_products(settings).outputs["product_class_map"]
    return getattr(stage, f"run_{name}")(class_map, settings)


def _set_cell(path: Path, row: int, column: str, value: str) -> None:
    lines = path.read_text().splitlines()
    header = lines[0].split(",")
    cells = lines[row].split(",")
    cells[header.index(column)] = value
    lines[row] = ",".join(cells)
    path.write_text("\n".join(lines) + "\n")


@pytest.mark.parametrize(
    ("name", "row", "column", "value", "named", "product_class"),
    [
        ("customer_spans", 3, "reference_customer", "C99", None, "a"),  # a reference customer without a span
        ("customer_spans", 6, "product", "P9", None, "a"),  # a span of a product not in the master (every class)
        ("pins", 1, "customer", "C77", None, "a"),  # a pin on a customer without a span
        ("pins", 1, "measure", "promo", None, "a"),  # a pin on a measure the config does not define
        ("adjustments", 1, "site", "S9", ("product", "P1"), "a"),  # reaches no customer: its product x site named
        ("adjustments", 1, "measure", "promo", None, "a"),
        ("shortages", 1, "product", "P9", None, "b"),  # a shortage of a product in no class reaches every class
    ],
)
def test_references_known_fails_on_one_corrupted_cell_and_names_its_file_and_row(
    tmp_path, name, row, column, value, named, product_class
):
    """Mutation test: the check passes on the corpus's valid folder and fails, naming the row, on one bad cell."""
    from assets.factory import StageAsset, Table, emit
    from pipelines.checks import REFERENCES_KNOWN, check_of

    folder = tmp_path / "inputs"
    shutil.copytree(BASE, folder)
    assert _input_run(folder, name, product_class).checks[REFERENCES_KNOWN].rows.empty
    _set_cell(folder / f"{name}.csv", row, column, value)
    result = _input_run(folder, name, product_class)
    failing = result.checks[REFERENCES_KNOWN].rows
    column_named, value_named = named or (column, value)
    named_rows = failing[["file", "row", "column", "value"]].values.tolist()
    assert named_rows == [[f"{name}.csv", row, column_named, value_named]]
    assert value in failing.iloc[0].tolist()
    # as the factory emits it: the catalogue's severity, the first failing rows and the partition in the metadata
    spec = StageAsset(tables=(Table(name, ""),), run=lambda **_: result, settings=lambda part: None, group="g")
    check = next(
        e for e in emit(spec, result, {"partition_cycle": "2026-03-02", "partition_class": product_class})
        if getattr(e, "check_name", "") == REFERENCES_KNOWN
    )
    assert not check.passed
    assert check.severity.value == check_of(name, REFERENCES_KNOWN).severity == ("ERROR" if name == "pins" else "WARN")
    first = check.metadata["first_failing_rows"].value
    assert f"{name}.csv" in first and value in first and column_named in first
    assert check.metadata["partition_class"].value == product_class
