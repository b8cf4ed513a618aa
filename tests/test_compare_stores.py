"""benchmarks/compare_stores.py: the tool that proves two demo stores hold the same rows."""

import sys
from pathlib import Path

import duckdb
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "benchmarks"))

import compare_stores  # noqa: E402


def store(path: Path, tables: dict[str, pd.DataFrame]) -> Path:
    with duckdb.connect(str(path)) as con:
        for name, frame in tables.items():
            con.register("f", frame)
            con.execute(f'CREATE TABLE "{name}" AS SELECT * FROM f')
            con.unregister("f")
    return path


def test_identical_after_renames_in_any_row_order(tmp_path, capsys):
    # the last release's column and values, in another row order
    old = store(
        tmp_path / "old.duckdb",
        {
            "statistical_forecast": pd.DataFrame(
                {"customer": ["C1", "C2"], "forecast": [1.5, float("nan")], "split_basis": ["target", "own_forecast"]}
            ),
            "partitions_written": pd.DataFrame(
                {"asset": ["statistical_forecast"], "written_at": [pd.Timestamp("2026-01-01")]}
            ),
        },
    )
    new = store(tmp_path / "new.duckdb", {
        "statistical_forecast": pd.DataFrame({"customer": ["C2", "C1"], "forecast": [float("nan"), 1.5],
                                              "basis": ["leaf_forecast", "reinitialized_target"]}),
        "partitions_written": pd.DataFrame({"asset": ["statistical_forecast", "strategy_choice"],
                                            "written_at": [pd.Timestamp("2026-02-01")] * 2}),
        "strategy_choice": pd.DataFrame({"product_class": ["a"]}),
    })
    assert compare_stores.compare(old, new) == 0
    out = capsys.readouterr().out
    assert "2 of 2 tables of OLD identical" in out and "new   strategy_choice" in out
    # without the renames the column is missing and the values differ
    assert compare_stores.compare(old, new, use_renames=False) == 1


def test_one_changed_number_is_a_difference_naming_the_column(tmp_path, capsys):
    old = store(
        tmp_path / "old.duckdb", {"share_tables": pd.DataFrame({"customer": ["C1", "C2"], "share": [0.25, 0.75]})}
    )
    new = store(
        tmp_path / "new.duckdb", {"share_tables": pd.DataFrame({"customer": ["C1", "C2"], "share": [0.25, 0.7500001]})}
    )
    assert compare_stores.compare(old, new) == 1
    assert "column share: 1 rows differ" in capsys.readouterr().out
