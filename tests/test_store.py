"""The store: a Parquet file per version of each asset partition, cycles published whole.

Checked against DuckDB and pyarrow themselves (what a plain SQL query over the
published views returns, what a Parquet reader finds in the folder), not
against our own reader only.
"""

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from pipelines.store import (
    PARTITION_CLASS,
    PARTITION_CYCLE,
    StoreError,
    open_store,
    read_table,
    stored_cycles,
    write_partition,
)

ROOT = Path(__file__).resolve().parents[1]


def _frame(values, text=None):
    frame = pd.DataFrame(
        {"value": values, "label": text if text is not None else [f"r{i}" for i in range(len(values))]}
    )
    frame["label"] = frame["label"].astype("string")
    return frame


def _complete(store, cycle, product_class, classes, tables=("t",), run_id="r"):
    s = open_store(store)
    return s.complete_class(
        cycle, product_class, {t: s.latest(t, cycle, product_class) for t in tables}, run_id=run_id, classes=classes
    )


def _visible_parquet(folder: Path) -> list[Path]:
    return sorted(p for p in folder.rglob("*.parquet") if not p.name.startswith("."))


def test_rewriting_a_partition_makes_a_new_version_and_replaces_exactly_its_rows(tmp_path):
    store = tmp_path / "s"
    write_partition(store, "t", _frame([1.0, 2.0]), "2026-11-23", "a")
    write_partition(store, "t", _frame([10.0]), "2026-11-23", "b")
    write_partition(store, "t", _frame([3.0, 4.0, 5.0]), "2026-11-30", "a")
    # rerun of 2026-11-23|a with other values: its two rows are replaced, nothing duplicated
    write_partition(store, "t", _frame([7.0, 8.0]), "2026-11-23", "a")
    latest = read_table(store, "t", versions="latest", with_partition=True)
    counts = latest.groupby([PARTITION_CYCLE, PARTITION_CLASS]).size().to_dict()
    assert counts == {("2026-11-23", "a"): 2, ("2026-11-23", "b"): 1, ("2026-11-30", "a"): 3}
    got = read_table(store, "t", cycle="2026-11-23", product_class="a", versions="latest")
    assert list(got.columns) == ["value", "label"]  # the partition columns stay in the store
    assert got["value"].tolist() == [7.0, 8.0]
    assert read_table(store, "t", product_class="a", versions="latest")["value"].tolist() == [7.0, 8.0, 3.0, 4.0, 5.0]
    # the superseded version of 2026-11-23|a, never published, is gone; one file per partition is left
    assert len(_visible_parquet(store / "tables" / "t")) == 3
    written = read_table(store, "partitions_written", versions="latest")
    assert written[["asset", PARTITION_CYCLE, PARTITION_CLASS, "rows"]].values.tolist() == [
        ["t", "2026-11-23", "a", 2],
        ["t", "2026-11-23", "b", 1],
        ["t", "2026-11-30", "a", 3],
    ]
    # each file is plain Parquet holding the partition's rows with its partition columns
    file = open_store(store).partition_dir("t", "2026-11-23", "a") / written["file"].iloc[0]
    assert pq.read_table(file).to_pydict() == {
        PARTITION_CYCLE: ["2026-11-23"] * 2,
        PARTITION_CLASS: ["a"] * 2,
        "value": [7.0, 8.0],
        "label": ["r0", "r1"],
    }
    # nothing is published yet: readers see no cycle
    assert stored_cycles(store, "t") == [] and read_table(store, "t").empty


def test_an_empty_partition_is_stored_and_read_back_empty(tmp_path):
    store = tmp_path / "s"
    write_partition(store, "t", _frame([], text=[]), "2026-11-30", "a")
    write_partition(store, "t", _frame([1.5], text=["x"]), "2026-11-30", "b")
    empty = read_table(store, "t", cycle="2026-11-30", product_class="a", versions="latest")
    assert empty.empty and list(empty.columns) == ["value", "label"]
    assert read_table(store, "t", product_class="b", versions="latest")["label"].tolist() == ["x"]
    # an all-missing text column is still text, so a later partition with values fits it
    schema = open_store(store).schema("t")
    assert schema.field("label").type == pa.string()


def test_columns_new_in_a_release_and_wider_numbers_are_added(tmp_path):
    store = tmp_path / "s"
    # first written with whole numbers (int64), then a partition with fractions and an extra column
    write_partition(store, "t", _frame([1, 2]), "2026-11-23", "a")
    write_partition(store, "t", _frame([0.5]).assign(extra=pd.array(["new"], dtype="string")), "2026-11-30", "a")
    old = read_table(store, "t", cycle="2026-11-23", versions="latest")
    assert old["value"].dtype == np.float64 and old["value"].tolist() == [1.0, 2.0] and old["extra"].isna().all()
    assert read_table(store, "t", cycle="2026-11-30", versions="latest")["value"].tolist() == [0.5]
    both = read_table(store, "t", versions="latest")
    assert both["value"].tolist() == [1.0, 2.0, 0.5] and both["extra"].tolist() == [None, None, "new"]


def test_a_store_of_an_older_layout_says_to_rerun_the_cycle(tmp_path):
    old = tmp_path / "apportion.duckdb"
    with duckdb.connect(str(old)) as con:
        con.execute("CREATE TABLE t AS SELECT 1 AS value, 'old' AS label")
    with pytest.raises(StoreError, match=r"one DuckDB file, the store layout of earlier releases.*rerun the cycle"):
        read_table(old, "t", cycle="2026-11-30", product_class="a")
    with pytest.raises(StoreError, match="Set store.path to a folder"):
        write_partition(old, "t", _frame([1.0]), "2026-11-30", "a")
    # a column whose type changed in a way older partitions cannot be read as: rerun that cycle
    store = tmp_path / "s"
    write_partition(store, "t", _frame([1.0]).assign(label=pd.array(["x"], dtype="string")), "2026-11-23", "a")
    write_partition(store, "t", _frame([2.0]).assign(label=[3.5]), "2026-11-30", "a")
    assert read_table(store, "t", cycle="2026-11-30", versions="latest")["label"].tolist() == [3.5]
    with pytest.raises(
        StoreError, match=r"partition 2026-11-23\|a .* written by an older release.*rerun the cycle 2026-11-23"
    ):
        read_table(store, "t", versions="latest")


def test_a_failed_write_leaves_the_partition_as_it_was(tmp_path, monkeypatch):
    import errno

    import pipelines.store.store as store_module

    store = tmp_path / "s"
    write_partition(store, "t", _frame([1.0, 2.0]), "2026-11-30", "a")
    # a column Parquet cannot hold (complex numbers): refused before any file is touched
    with pytest.raises(pa.ArrowNotImplementedError):
        write_partition(store, "t", _frame([3.0]).assign(z=[1 + 2j]), "2026-11-30", "a")

    # the disk fills up half-way through the file
    def half_then_full(table, where, **kw):
        Path(where).write_bytes(b"PAR1 half a file")
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(store_module.pq, "write_table", half_then_full)
    with pytest.raises(OSError, match="No space left"):
        write_partition(store, "t", _frame([4.0]), "2026-11-30", "a")
    assert read_table(store, "t", versions="latest")["value"].tolist() == [1.0, 2.0]
    assert [p.name for p in (store / "tables" / "t").rglob("*") if p.name.startswith(".tmp-")] == []
    assert len(_visible_parquet(store / "tables" / "t")) == 1


def test_a_missing_table_reads_as_none(tmp_path):
    store = tmp_path / "s"
    write_partition(store, "t", _frame([1.0]), "2026-11-30", "a")
    assert read_table(store, "nope") is None and read_table(tmp_path / "no_store", "t") is None


def test_arrow_tables_in_and_out(tmp_path):
    store = tmp_path / "s"
    table = pa.table({"leaf": pa.array([0, 1, 2], pa.int32()), "value": pa.array([0.5, 1.5, 2.5], pa.float32())})
    write_partition(store, "t", table, "2026-11-30", "a")
    got = read_table(store, "t", versions="latest", as_arrow=True)
    assert got.equals(table)  # types kept exactly (int32, float32), no pandas round trip


KILLED_WRITER = """
import sys
import numpy as np, pandas as pd
from pipelines.store import write_partition
n = int(sys.argv[2])
frame = pd.DataFrame({"value": np.arange(n, dtype=float), "key": pd.array(np.arange(n).astype(str), dtype="string")})
print("writing", flush=True)
write_partition(sys.argv[1], "t", frame, "2026-11-30", "a", run_id="killed")
print("written", flush=True)
"""


def test_a_writer_killed_mid_write_leaves_the_previous_version_and_no_partial_file(tmp_path):
    store = tmp_path / "s"
    write_partition(store, "t", _frame([1.0, 2.0]), "2026-11-30", "a", run_id="good")
    folder = open_store(store).partition_dir("t", "2026-11-30", "a")
    rows = 2_000_000
    for _attempt in range(4):  # a larger frame if the writer finished before it was caught writing
        child = subprocess.Popen(
            [sys.executable, "-c", KILLED_WRITER, str(store), str(rows)], cwd=ROOT, stdout=subprocess.PIPE, text=True
        )
        assert child.stdout.readline().strip() == "writing"
        caught = None
        while caught is None and child.poll() is None:
            caught = next((p for p in folder.iterdir() if p.name.startswith(".tmp-")), None)
            if caught is None:
                time.sleep(0.001)
        if caught is not None:
            os.kill(child.pid, signal.SIGKILL)  # kill -9 while the temporary file is being written
        child.wait()
        if child.returncode == -signal.SIGKILL and caught is not None and len(_visible_parquet(folder)) == 1:
            break
        rows *= 2
    else:
        pytest.fail("could not kill the writer in the middle of a write")
    # the temporary file is there, partial, under a name no reader opens; the previous version is the latest
    assert any(p.name.startswith(".tmp-") for p in folder.iterdir())
    assert [p.name for p in _visible_parquet(folder)] == [open_store(store).latest("t", "2026-11-30", "a")["0"]["file"]]
    assert read_table(store, "t", versions="latest")["value"].tolist() == [1.0, 2.0]
    for path in _visible_parquet(store):  # every file a reader could open is whole
        pq.read_table(path)
    # the next write in that partition clears the dead writer's temporary file
    write_partition(store, "t", _frame([3.0]), "2026-11-30", "a", run_id="next")
    assert not any(p.name.startswith(".tmp-") for p in folder.iterdir())


def test_publication_waits_for_every_class_and_readers_see_only_published_cycles(tmp_path):
    store = tmp_path / "s"
    classes = ["a", "b", "c"]
    for k, v in zip(classes, (1.0, 2.0, 3.0), strict=False):
        write_partition(store, "t", _frame([v]), "2026-11-30", k)
    assert not _complete(store, "2026-11-30", "a", classes).is_published
    status = _complete(store, "2026-11-30", "b", classes)
    assert not status.is_published and status.incomplete == ["c"]
    assert stored_cycles(store, "t") == [] and not (store / "published.duckdb").exists()
    status = _complete(store, "2026-11-30", "c", classes)
    assert status.is_published and status.incomplete == []
    assert stored_cycles(store, "t") == ["2026-11-30"]
    assert read_table(store, "t")["value"].tolist() == [1.0, 2.0, 3.0]
    # SQL users query the same rows through the views, as DuckDB reads the Parquet files
    with duckdb.connect(str(store / "published.duckdb"), read_only=True) as con:
        rows = con.execute("select partition_class, value from t order by partition_class").fetchall()
        cycles = con.execute("select partition_cycle, classes from published_cycles").fetchall()
    assert rows == [("a", 1.0), ("b", 2.0), ("c", 3.0)] and cycles == [("2026-11-30", "a, b, c")]


def test_a_rerun_publishes_only_when_every_class_it_restarted_completes_again(tmp_path):
    store = tmp_path / "s"
    classes = ["a", "b"]
    for k in classes:
        write_partition(store, "t", _frame([1.0]), "2026-11-30", k)
        _complete(store, "2026-11-30", k, classes)
    first = open_store(store).published("2026-11-30")
    with duckdb.connect(str(store / "published.duckdb"), read_only=True) as con:  # a SQL session left open
        # a rerun of the cycle: both classes pending, a passes and completes, b writes and fails before completing
        open_store(store).begin("2026-11-30", classes, command="cycle")
        write_partition(store, "t", _frame([5.0]), "2026-11-30", "a")
        status = _complete(store, "2026-11-30", "a", classes)
        write_partition(store, "t", _frame([6.0]), "2026-11-30", "b")
        assert not status.is_published or status.published == first
        assert open_store(store).published("2026-11-30") == first
        assert read_table(store, "t")["value"].tolist() == [1.0, 1.0]
        assert con.execute("select value from t order by partition_class").fetchall() == [(1.0,), (1.0,)]
        assert open_store(store).status("2026-11-30", classes).newer_run_incomplete
        # b is rebuilt and completes: the cycle is published again with both new classes
        _complete(store, "2026-11-30", "b", classes)
    assert read_table(store, "t")["value"].tolist() == [5.0, 6.0]
    assert open_store(store).published("2026-11-30")["sequence"] == 2
    # the old published versions stay one publication longer (a reader may be reading them), then go
    folder = store / "tables" / "t"
    assert len(_visible_parquet(folder)) == 4
    write_partition(store, "t", _frame([7.0]), "2026-11-30", "a")
    _complete(store, "2026-11-30", "a", classes)
    assert read_table(store, "t")["value"].tolist() == [7.0, 6.0]
    assert len(_visible_parquet(folder / "cycle=2026-11-30" / "class=a")) == 2  # published now and the one before


def test_previous_cycle_is_the_last_one_the_class_completed(tmp_path):
    store = tmp_path / "s"
    for cycle in ("2026-11-16", "2026-11-23"):
        write_partition(store, "t", _frame([1.0]), cycle, "a")
    _complete(store, "2026-11-16", "a", ["a", "b"])  # a complete, the cycle waits for b
    # 2026-11-23 was written but never completed: drift compares with 2026-11-16
    assert open_store(store).previous_cycle("t", "2026-11-30", "a") == "2026-11-16"
    assert read_table(store, "t", cycle="2026-11-16", product_class="a", versions="complete")["value"].tolist() == [1.0]
    assert open_store(store).previous_cycle("t", "2026-11-30", "b") is None


def test_the_io_manager_holds_the_partition_for_the_run_and_passes_arrow_or_pandas_by_annotation(tmp_path):
    import dagster as dg
    import yaml

    from pipelines.partitions import cycle_class_partitions, partition_key, register_partitions
    from pipelines.resources import PartitionStore, PlanningConfigResource

    config = tmp_path / "planning.yaml"
    config.write_text(yaml.safe_dump({"store": {"path": str(tmp_path / "s")}, "product_classes": {"a": {"window": 4}}}))
    seen = {}

    @dg.asset(partitions_def=cycle_class_partitions)
    def up() -> pa.Table:
        seen["writer"] = open_store(tmp_path / "s").writer_of("2026-11-30", "a")
        return pa.table({"leaf": pa.array([0, 1], pa.int32())})

    @dg.asset(partitions_def=cycle_class_partitions)
    def columnar(up: pa.Table) -> pd.DataFrame:
        seen["columnar"] = up
        return up.to_pandas()

    @dg.asset(partitions_def=cycle_class_partitions)
    def frame(up: pd.DataFrame) -> pd.DataFrame:
        seen["frame"] = up
        return up

    planning = PlanningConfigResource(path=str(config))
    instance = dg.DagsterInstance.ephemeral()
    register_partitions(instance, "2026-11-30", ["a"])
    result = dg.materialize(
        [up, columnar, frame],
        partition_key=partition_key("2026-11-30", "a"),
        instance=instance,
        resources={"planning": planning, "io_manager": PartitionStore(planning=planning)},
    )
    assert result.success
    assert seen["writer"]["run_id"] == result.run_id  # the run held its partition while it ran ...
    assert open_store(tmp_path / "s").writer_of("2026-11-30", "a") is None  # ... and let it go at the end
    assert isinstance(seen["columnar"], pa.Table) and seen["columnar"].schema.field("leaf").type == pa.int32()
    assert isinstance(seen["frame"], pd.DataFrame) and seen["frame"]["leaf"].tolist() == [0, 1]
    # the run is tagged with the process that executed it, and the class is pending until it completes
    tags = instance.get_run_by_id(result.run_id).tags
    assert tags["apportion/pid"] == str(os.getpid())
    assert open_store(tmp_path / "s").class_record("2026-11-30", "a")["state"] == "pending"


def test_reading_some_columns_gives_the_full_reads_columns_from_every_version_of_the_files(tmp_path):
    """`columns=`: the same rows and values as the whole read, only the columns asked for in the order asked; a
    filter on a column not asked for still filters; a column an older file lacks comes as nulls, as in the whole
    read; a column the table never had is left out."""
    store = tmp_path / "s"
    write_partition(store, "t", _frame([1.0, 2.0]), "2026-11-23", "a")
    write_partition(store, "t", _frame([3.0]).assign(extra=[9]), "2026-11-23", "b")  # a column added later
    whole = read_table(store, "t", versions="latest")
    some = read_table(store, "t", versions="latest", columns=["extra", "value", "never"])
    assert list(some.columns) == ["extra", "value"]
    pd.testing.assert_frame_equal(some, whole[["extra", "value"]])
    assert some["extra"].isna().tolist() == [True, True, False]
    filtered = read_table(store, "t", versions="latest", columns=["value"], where={"label": "r1"})
    pd.testing.assert_frame_equal(
        filtered, whole.loc[whole["label"] == "r1", ["value"]].reset_index(drop=True), check_index_type=False
    )
    assert filtered["value"].tolist() == [2.0]


def test_text_columns_read_dictionary_encoded_give_the_plain_reads_texts(tmp_path):
    """`dictionary=`: the text columns as each file's codes and distinct texts; decoded, the plain read's."""
    from pipelines.store import open_store

    store = tmp_path / "s"
    write_partition(store, "t", _frame([1.0, 2.0]), "2026-11-23", "a")
    write_partition(store, "t", _frame([3.0]).assign(label=["r9"]), "2026-11-23", "b")
    reader = open_store(store)
    plain = reader.read("t", versions="latest", columns=["label", "value"], as_arrow=True)
    coded = reader.read("t", versions="latest", columns=["label", "value"], as_arrow=True, dictionary=["label"])
    assert pa.types.is_dictionary(coded.schema.field("label").type)
    assert coded["label"].cast(pa.string()).equals(plain["label"]) and coded["value"].equals(plain["value"])
    with pytest.raises(ValueError, match="dictionary"):
        reader.read("t", columns=["label"], as_arrow=True, dictionary=["label"], where={"label": "r1"})
