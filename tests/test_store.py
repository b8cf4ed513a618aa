"""The DuckDB store: one table per asset holding every cycle x class partition side by side.

Checked against DuckDB itself (the rows a plain SQL query returns), not against
our own reader only.
"""

import duckdb
import numpy as np
import pandas as pd
import pytest

from pipelines.resources import (
    PARTITION_CLASS,
    PARTITION_CYCLE,
    PARTITION_ROW,
    StoreError,
    read_table,
    stored_cycles,
    write_partition,
)


def _frame(cycle, product_class, values, text=None):
    frame = pd.DataFrame(
        {"value": values, "label": text if text is not None else [f"r{i}" for i in range(len(values))]}
    )
    frame["label"] = frame["label"].astype("string")
    frame.insert(0, PARTITION_ROW, np.arange(len(frame), dtype=np.int64))
    frame.insert(0, PARTITION_CLASS, pd.array([product_class] * len(frame), dtype="string"))
    frame.insert(0, PARTITION_CYCLE, pd.array([cycle] * len(frame), dtype="string"))
    return frame


def _write(path, cycle, product_class, values, **kw):
    with duckdb.connect(str(path)) as con:
        write_partition(con, "t", _frame(cycle, product_class, values, **kw), cycle, product_class)


def test_rewriting_a_partition_replaces_exactly_its_rows(tmp_path):
    store = tmp_path / "s.duckdb"
    _write(store, "2026-11-23", "a", [1.0, 2.0])
    _write(store, "2026-11-23", "b", [10.0])
    _write(store, "2026-11-30", "a", [3.0, 4.0, 5.0])
    # rerun of 2026-11-23|a with other values: its two rows are replaced, nothing duplicated
    _write(store, "2026-11-23", "a", [7.0, 8.0])
    with duckdb.connect(str(store), read_only=True) as con:
        counts = dict(
            con.execute("SELECT partition_cycle || '|' || partition_class, count(*) FROM t GROUP BY 1").fetchall()
        )
        written = con.execute(
            "SELECT asset, partition_cycle, partition_class, rows FROM partitions_written ORDER BY 2, 3"
        ).fetchall()
    assert counts == {"2026-11-23|a": 2, "2026-11-23|b": 1, "2026-11-30|a": 3}
    assert written == [("t", "2026-11-23", "a", 2), ("t", "2026-11-23", "b", 1), ("t", "2026-11-30", "a", 3)]
    got = read_table(store, "t", cycle="2026-11-23", product_class="a")
    assert list(got.columns) == ["value", "label"]  # the partition columns stay in the store
    assert got["value"].tolist() == [7.0, 8.0]
    assert read_table(store, "t", product_class="a")["value"].tolist() == [7.0, 8.0, 3.0, 4.0, 5.0]
    both = read_table(store, "t", cycle="2026-11-23", with_partition=True)
    assert both[PARTITION_CLASS].tolist() == ["a", "a", "b"] and PARTITION_ROW not in both
    assert stored_cycles(store, "t") == ["2026-11-23", "2026-11-30"]


def test_an_empty_partition_is_stored_and_read_back_empty(tmp_path):
    store = tmp_path / "s.duckdb"
    _write(store, "2026-11-30", "a", [], text=[])
    _write(store, "2026-11-30", "b", [1.5], text=["x"])
    assert read_table(store, "t", cycle="2026-11-30", product_class="a").empty
    assert read_table(store, "t", product_class="b")["label"].tolist() == ["x"]


def test_columns_new_in_a_release_and_wider_numbers_are_added(tmp_path):
    store = tmp_path / "s.duckdb"
    # first written with whole numbers (BIGINT), then a partition with fractions and an extra column
    with duckdb.connect(str(store)) as con:
        write_partition(con, "t", _frame("2026-11-23", "a", [1, 2]), "2026-11-23", "a")
        later = _frame("2026-11-30", "a", [0.5]).assign(extra=pd.array(["new"], dtype="string"))
        write_partition(con, "t", later, "2026-11-30", "a")
    old = read_table(store, "t", cycle="2026-11-23")
    assert old["value"].tolist() == [1.0, 2.0] and old["extra"].isna().all()
    assert read_table(store, "t", cycle="2026-11-30")["value"].tolist() == [0.5]


def test_a_table_from_before_partitions_is_replaced(tmp_path):
    store = tmp_path / "s.duckdb"
    with duckdb.connect(str(store)) as con:
        con.execute("CREATE TABLE t AS SELECT 1 AS value, 'old' AS label")
    # until it is rewritten, no partition can be picked out of it: the rows name none
    with pytest.raises(StoreError, match="written before cycles and classes were kept apart"):
        read_table(store, "t", cycle="2026-11-30", product_class="a")
    _write(store, "2026-11-30", "a", [9.0])
    assert read_table(store, "t", with_partition=True).to_dict("records") == [
        {PARTITION_CYCLE: "2026-11-30", PARTITION_CLASS: "a", "value": 9.0, "label": "r0"}
    ]


def test_a_failed_write_leaves_the_partition_as_it_was(tmp_path):
    store = tmp_path / "s.duckdb"
    _write(store, "2026-11-30", "a", [1.0, 2.0])
    bad = _frame("2026-11-30", "a", [3.0]).assign(value=pd.array(["not a number"], dtype="string"))
    with duckdb.connect(str(store)) as con, pytest.raises(duckdb.Error):
        write_partition(con, "t", bad, "2026-11-30", "a")
    assert read_table(store, "t")["value"].tolist() == [1.0, 2.0]


def test_a_missing_table_reads_as_none(tmp_path):
    store = tmp_path / "s.duckdb"
    _write(store, "2026-11-30", "a", [1.0])
    assert read_table(store, "nope") is None
