"""A handful of bad inputs through the Dagster graph and the command line, on the corpus's small master.

`python -m pipelines cycle` must exit 0 when only history lines were
quarantined, 2 when an input cannot be read (naming the file and column), and
1 when a blocking check failed, printing the check's first failing rows (file,
row, column) and what to do, and listing them in the HTML report; every check
result carries its partition. The other bad inputs run without Dagster in
tests/test_bad_inputs.py.
"""

from __future__ import annotations

import pytest
import yaml
from test_bad_inputs import apply, build

from pipelines.__main__ import EXIT_BAD_INPUT, EXIT_CHECK_FAILED, EXIT_CRASH, EXIT_OK, main
from pipelines.resources import read_table

pytestmark = pytest.mark.graph


def cycle(tmp_path, monkeypatch, capsys, steps, classes=("a",)) -> tuple[int, str, str, str]:
    """Break the base folder by `steps`, run the cycle of `classes` on the command line; (exit code, out, err,
    config)."""
    folder, config = build(tmp_path, {"do": steps})
    for step in steps:
        config = apply(folder, config, {"config": step["config"]}) if "config" in step else config
    path = tmp_path / "planning.yaml"
    path.write_text(yaml.safe_dump(config))
    monkeypatch.setenv("DAGSTER_HOME", str(tmp_path / "dagster"))
    args = ["cycle", "--config", str(path)] + [a for c in classes for a in ("--class", c)]
    code = main(args)
    captured = capsys.readouterr()
    return code, captured.out, captured.err, str(path)


def test_stray_lines_are_quarantined_and_the_cycle_exits_0(tmp_path, monkeypatch, capsys):
    code, out, _, config = cycle(
        tmp_path,
        monkeypatch,
        capsys,
        [
            {"append": "history.csv", "line": "P1,S1,C1,2099-01-05,5"},  # far future: must not move the cycle
            {"append": "history.csv", "line": "P1,S1,C2,1900-01-01,5"},  # a century back: must not stretch history
            {"append": "history.csv", "line": "P2,S1,C1,2025-12-03,1e308"},
            {"append": "history.csv", "line": "P1,S1,C3,2025-12-03T10:00:00+02:00,5"},
        ],
    )
    assert code == EXIT_OK, out
    assert "cycle date 2026-03-02" in out and "2099-01-05" in out  # the stray line named as ignored
    store = tmp_path / "store"  # class a completed; the cycle waits for class b before it is published
    rejected = read_table(store, "rejected_rows", versions="complete")
    assert dict(zip(rejected["source_row"], rejected["reason"], strict=True)) == {
        183: "date_after_window", 184: "date_before_window", 185: "quantity_out_of_bounds"
    }
    calendar = read_table(store, "cycle_calendar", versions="complete").iloc[0]
    assert str(calendar["cycle_date"].date()) == "2026-03-02" and str(calendar["history_start"].date()) == "2025-09-01"
    forecast = read_table(store, "parent_forecast", versions="complete")
    assert forecast["forecast"].abs().max() < 1e3  # 1e308 never reached the forecast


def test_an_unknown_column_exits_2_naming_the_file_and_the_column(tmp_path, monkeypatch, capsys):
    code, out, err, _ = cycle(
        tmp_path,
        monkeypatch,
        capsys,
        [{"header": "history.csv", "text": "product,site,customer,period_start,quantity,note"}],
    )
    assert code == EXIT_BAD_INPUT
    assert "history.csv" in err and "'note'" in err


def test_bad_input_found_inside_a_run_exits_2_and_a_bug_exits_3(tmp_path, monkeypatch, capsys):
    # a product class the config does not know stops the products step with a ConfigError: bad input, 2
    bulky = {"set": "products.csv", "row": 1, "column": "product_class", "value": "bulky"}
    code, out, _, _ = cycle(tmp_path / "class", monkeypatch, capsys, [bulky])
    assert code == EXIT_BAD_INPUT
    assert "'bulky'" in out and "product_classes" in out
    # anything else a step raises is a bug, 3, with the run id and the message printed

    def broken(*args, **kwargs):
        raise RuntimeError("a bug planted by the test")

    monkeypatch.setattr("pipelines.stages.master_data.unknown_references", broken)
    code, out, _, _ = cycle(tmp_path / "bug", monkeypatch, capsys, [])
    assert code == EXIT_CRASH
    assert "a bug planted by the test" in out and "run " in out


def test_a_blocking_input_check_exits_1_and_prints_its_rows_on_the_console_and_in_the_report(
    tmp_path, monkeypatch, capsys
):
    code, out, _, _ = cycle(
        tmp_path,
        monkeypatch,
        capsys,
        [
            {"set": "customer_spans.csv", "row": 3, "column": "active_from", "value": "2026-01-01"},
            {"set": "customer_spans.csv", "row": 3, "column": "active_to", "value": "2025-06-01"},
            {"set": "pins.csv", "row": 1, "column": "customer", "value": "C77"},
            {"set": "customer_spans.csv", "row": 2, "column": "reference_customer", "value": "C99"},
        ],
    )
    assert code == EXIT_CHECK_FAILED
    # console: each failed check with its partition, first rows (file, row, column, value) and what to do
    spans = out[out.index("FAILED ERROR customer_spans [a]: customer_spans_matches_schema"):]
    assert "customer_spans.csv" in spans.split("what to do")[0] and "span_ordered" in spans and "C3" in spans
    pins = out[out.index("FAILED ERROR pins [a]: references_known"):]
    first = pins.split("what to do:")[0]
    assert "pins.csv" in first and "C77" in first and "customer" in first
    assert "what to do: correct the customer" in pins
    assert "FAILED WARN  customer_spans [a]: references_known" in out and "C99" in out
    # report: the same rows under "First failing rows"
    report = next((tmp_path / "reports").rglob("cycle_report.html")).read_text()
    section = report[report.index("First failing rows"):]
    assert "pins.csv" in section and "C77" in section and "customer_spans.csv" in section and "What to do" in section


def test_every_check_result_carries_its_partition(tmp_path):
    import dagster as dg

    from pipelines.config import load_config
    from pipelines.definitions import build_definitions
    from pipelines.runner import run_partitions

    folder, config = build(tmp_path, {"do": [{"set": "pins.csv", "row": 1, "column": "customer", "value": "C77"}]})
    path = tmp_path / "planning.yaml"
    path.write_text(yaml.safe_dump(config))
    defs = build_definitions(str(path))
    upstream = dg.AssetSelection.assets("pins", "cleaned_history").upstream().required_multi_asset_neighbors()
    run = run_partitions(
        defs,
        dg.DagsterInstance.ephemeral(),
        "2026-03-02",
        ["b"],
        selection=list(upstream.resolve(defs.resolve_asset_graph())),
    )
    evaluations = run.get_asset_check_evaluations()
    assert evaluations and load_config(path).product_classes
    for e in evaluations:
        assert e.metadata["partition_cycle"].value == "2026-03-02", e.check_name
        assert e.metadata["partition_class"].value == "b", e.check_name
