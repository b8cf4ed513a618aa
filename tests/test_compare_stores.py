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


def folder_store(path: Path, frame: pd.DataFrame) -> Path:
    """A folder store holding `frame` as the one published partition 2026-11-30|spares of table `shares`."""
    from pipelines.store import open_store, write_partition

    write_partition(path, "shares", frame, "2026-11-30", "spares")
    s = open_store(path)
    s.complete_class(
        "2026-11-30", "spares", {"shares": s.latest("shares", "2026-11-30", "spares")}, run_id="r", classes=["spares"]
    )
    return path


def test_a_folder_store_compares_with_the_duckdb_layout(tmp_path, capsys):
    # the same rows, once in the DuckDB file of the last release (with its row-order column) and once published
    # in the folder store (with its shard column): identical; then one share changed in the folder store: caught
    rows = pd.DataFrame({"customer": ["C1", "C2"], "share": [0.25, 0.75]})
    old_rows = rows.assign(partition_cycle="2026-11-30", partition_class="spares", partition_row=[0, 1])
    old = store(tmp_path / "old.duckdb", {"shares": old_rows})
    assert compare_stores.main([str(old), str(folder_store(tmp_path / "same", rows)), "--no-renames"]) == 0
    changed = rows.assign(share=[0.25, 0.7500001])
    assert compare_stores.main([str(old), str(folder_store(tmp_path / "changed", changed)), "--no-renames"]) == 1
    assert "column share: 1 rows differ" in capsys.readouterr().out


def test_a_store_that_published_nothing_is_no_proof_unless_its_latest_versions_are_read(tmp_path, capsys):
    # a store of `benchmarks/cycle.py --store`: partitions written, no cycle published
    from pipelines.store import write_partition

    old, new = tmp_path / "old", tmp_path / "new"
    write_partition(old, "share_tables", pd.DataFrame({"customer": ["C1", "C2"], "share": [0.25, 0.75]}),
                    "2026-11-23", "a")
    write_partition(new, "share_tables", pd.DataFrame({"customer": ["C1", "C2"], "share": [0.25, 0.7500001]}),
                    "2026-11-23", "a")
    # read as published: no row on either side, which would compare as "same"; it is refused
    assert compare_stores.compare(old, new) == 2
    assert "NOTHING TO COMPARE" in capsys.readouterr().out
    # the latest versions hold the rows, and the changed number is found
    assert compare_stores.compare(old, new, versions="latest") == 1
    assert "column share: 1 rows differ" in capsys.readouterr().out
