"""Dagster resources: the planning config and the DuckDB store.

Nothing here reads a file at import time; the config is read when a run first
asks for it.
"""

from __future__ import annotations

import os
import time
from functools import cached_property
from pathlib import Path

import dagster as dg
import duckdb
import numpy as np
import pandas as pd

from pipelines.config import PlanningConfig, load_config
from pipelines.errors import PlanningError
from pipelines.partitions import split_key

DEFAULT_CONFIG = "config/planning.yaml"
CONFIG_ENV = "APPORTION_CONFIG"


class PlanningConfigResource(dg.ConfigurableResource):
    """The validated planning config. `path` defaults to $APPORTION_CONFIG, else config/planning.yaml."""

    path: str = ""

    @cached_property
    def config(self) -> PlanningConfig:
        return load_config(self.path or os.environ.get(CONFIG_ENV, DEFAULT_CONFIG))


class StoreError(PlanningError):
    """The store cannot give what was asked (a table of an older layout)."""


PARTITION_CYCLE = "partition_cycle"
PARTITION_CLASS = "partition_class"
PARTITION_ROW = "partition_row"
PARTITION_COLUMNS = (PARTITION_CYCLE, PARTITION_CLASS, PARTITION_ROW)
LOCK_WAIT_SECONDS = 120.0
# the store's own table: one row per asset partition written, with its row count and time
WRITTEN = "partitions_written"
NUMERIC = {
    "TINYINT",
    "SMALLINT",
    "INTEGER",
    "BIGINT",
    "HUGEINT",
    "FLOAT",
    "DOUBLE",
    "UTINYINT",
    "USMALLINT",
    "UINTEGER",
    "UBIGINT",
}


def _connect(path: Path, read_only: bool = False) -> duckdb.DuckDBPyConnection:
    """A connection, waiting while another process holds the file's write lock (runs may overlap)."""
    deadline = time.monotonic() + LOCK_WAIT_SECONDS
    while True:
        try:
            return duckdb.connect(str(path), read_only=read_only)
        except duckdb.IOException as err:
            if "lock" not in str(err).lower() or time.monotonic() > deadline:
                raise
            time.sleep(0.5)


class DuckDBStore(dg.ConfigurableIOManager):
    """One DuckDB table per asset, named like the asset, in the file `store.path` of the config.

    Every table holds all partitions side by side: columns `partition_cycle`
    (the cycle date, ISO) and `partition_class` (the product class) say which
    partition a row belongs to, `partition_row` keeps the row order. Writing a
    partition deletes that partition's rows and inserts the new ones in one
    transaction, so a rerun replaces exactly its own rows and nothing is
    duplicated. Reading a partition returns its rows without those columns.

    Text columns are written as VARCHAR even when every value is missing, so a
    table's types do not depend on its content; a column new in this release is
    added to an existing table (older partitions read it as NULL).
    """

    planning: PlanningConfigResource

    @property
    def path(self) -> Path:
        return Path(self.planning.config.store.path)

    def handle_output(self, context: dg.OutputContext, obj: pd.DataFrame) -> None:
        table = context.asset_key.path[-1]
        cycle, product_class = split_key(context.asset_partition_key)
        frame = obj.astype({c: "string" for c in obj.columns if obj[c].dtype == object})
        frame = frame.reset_index(drop=True)
        frame.insert(0, PARTITION_ROW, np.arange(len(frame), dtype=np.int64))
        frame.insert(0, PARTITION_CLASS, pd.array([product_class] * len(frame), dtype="string"))
        frame.insert(0, PARTITION_CYCLE, pd.array([cycle] * len(frame), dtype="string"))
        self.path.parent.mkdir(parents=True, exist_ok=True)
        with _connect(self.path) as con:
            write_partition(con, table, frame, cycle, product_class)
        context.add_output_metadata(
            {
                "store_table": dg.MetadataValue.text(f"{self.path}::{table}"),
                "store_query": dg.MetadataValue.text(
                    f"SELECT * FROM {table} WHERE {PARTITION_CYCLE} = '{cycle}' AND {PARTITION_CLASS} = "
                    f"'{product_class}'"
                ),
            }
        )

    def load_input(self, context: dg.InputContext) -> pd.DataFrame:
        table = context.upstream_output.asset_key.path[-1]
        cycle, product_class = split_key(context.asset_partition_key)
        if not self.path.exists():
            raise FileNotFoundError(
                f"store {self.path} does not exist yet; run a cycle first (make demo, or python -m pipelines cycle)"
            )
        frame = read_table(self.path, table, cycle=cycle, product_class=product_class)
        if frame is None:
            raise FileNotFoundError(
                f"table {table!r} is not in the store {self.path}; materialize asset {table} for "
                f"{cycle}|{product_class} first"
            )
        if frame.empty and not partition_stored(self.path, table, cycle, product_class):
            raise FileNotFoundError(
                f"partition {cycle}|{product_class} of {table!r} is not in the store {self.path}; materialize {table} "
                f"for that partition first (python -m pipelines cycle --cycle {cycle} --class {product_class})"
            )
        return frame


def write_partition(
    con: duckdb.DuckDBPyConnection, table: str, frame: pd.DataFrame, cycle: str, product_class: str
) -> None:
    """Replace the rows of one partition of `table` by `frame` (which carries the partition columns)."""
    con.register("frame", frame)
    try:
        con.execute("BEGIN TRANSACTION")
        columns = _columns(con, table)
        if columns and PARTITION_CYCLE not in columns:
            # a table from a release before partitions: its rows name no cycle, so they cannot be kept apart
            con.execute(f'DROP TABLE "{table}"')
            columns = []
        if not columns:
            con.execute(f'CREATE TABLE "{table}" AS SELECT * FROM frame LIMIT 0')
            columns = _columns(con, table)
        stored = dict(con.execute(f'SELECT column_name, column_type FROM (DESCRIBE "{table}")').fetchall())
        for name, kind in con.execute("SELECT column_name, column_type FROM (DESCRIBE frame)").fetchall():
            if name not in stored:
                con.execute(f'ALTER TABLE "{table}" ADD COLUMN "{name}" {kind}')
            elif stored[name] == '"NULL"' and kind != stored[name]:
                # a column first written from an empty or all-missing frame has no type yet
                con.execute(f'ALTER TABLE "{table}" ALTER COLUMN "{name}" TYPE {kind}')
            elif kind != stored[name] and kind in NUMERIC and stored[name] in NUMERIC:
                # e.g. a count column that is whole in one partition and has gaps (float) in another
                con.execute(f'ALTER TABLE "{table}" ALTER COLUMN "{name}" TYPE DOUBLE')
        con.execute(
            f'DELETE FROM "{table}" WHERE {PARTITION_CYCLE} = ? AND {PARTITION_CLASS} = ?', [cycle, product_class]
        )
        con.execute(f'INSERT INTO "{table}" BY NAME SELECT * FROM frame')
        con.execute(
            f"CREATE TABLE IF NOT EXISTS {WRITTEN} (asset VARCHAR, {PARTITION_CYCLE} VARCHAR, "
            f"{PARTITION_CLASS} VARCHAR, rows BIGINT, written_at TIMESTAMP)"
        )
        con.execute(
            f"DELETE FROM {WRITTEN} WHERE asset = ? AND {PARTITION_CYCLE} = ? AND {PARTITION_CLASS} = ?",
            [table, cycle, product_class],
        )
        con.execute(f"INSERT INTO {WRITTEN} VALUES (?, ?, ?, ?, now())", [table, cycle, product_class, len(frame)])
        con.execute("COMMIT")
    except Exception:
        con.execute("ROLLBACK")
        raise
    finally:
        con.unregister("frame")


def _columns(con: duckdb.DuckDBPyConnection, table: str) -> list[str]:
    rows = con.execute(
        "SELECT column_name FROM information_schema.columns WHERE table_name = ? ORDER BY ordinal_position", [table]
    ).fetchall()
    return [r[0] for r in rows]


def partition_stored(store: Path | str, table: str, cycle: str, product_class: str) -> bool:
    """Whether the store holds a materialization of this partition (an empty result has a marker row count 0)."""
    with _connect(Path(store), read_only=True) as con:
        if not _columns(con, WRITTEN):
            return False
        found = con.execute(
            f"SELECT count(*) FROM {WRITTEN} WHERE asset = ? AND {PARTITION_CYCLE} = ? AND {PARTITION_CLASS} = ?",
            [table, cycle, product_class],
        ).fetchone()[0]
    return bool(found)


def read_table(
    store: Path | str,
    table: str,
    *,
    cycle: str | None = None,
    product_class: str | None = None,
    with_partition: bool = False,
    where: dict[str, str] | None = None,
) -> pd.DataFrame | None:
    """A table of the store (None when it does not exist), for one cycle and/or class or all of them.

    Without `with_partition` the partition columns are left out (a frame as the
    asset produced it); with it, `partition_cycle` and `partition_class` are kept.
    `where`: column -> value filters, applied where the table has the column.
    """
    clauses, params = [], []
    if cycle is not None:
        clauses.append(f"{PARTITION_CYCLE} = ?")
        params.append(str(cycle))
    if product_class is not None:
        clauses.append(f"{PARTITION_CLASS} = ?")
        params.append(product_class)
    with _connect(Path(store), read_only=True) as con:
        columns = _columns(con, table)
        if not columns:
            return None
        for name, value in (where or {}).items():  # only on columns the table has: a filter it cannot take is no filter
            if name in columns:
                clauses.append(f'"{name}" = ?')
                params.append(value)
        if PARTITION_CYCLE not in columns:
            if cycle is not None or product_class is not None:
                # written by a release before partitions: its rows name no cycle or class, so none can be picked
                raise StoreError(
                    f"table {table!r} in the store {store} was written before cycles and classes were kept apart; "
                    f"run the whole cycle once (python -m pipelines cycle) to rewrite it"
                )
            return con.execute(f'SELECT * FROM "{table}"').df()
        keep = [c for c in columns if c not in PARTITION_COLUMNS or (with_partition and c != PARTITION_ROW)]
        select = ", ".join(f'"{c}"' for c in keep)
        clause = f" WHERE {' AND '.join(clauses)}" if clauses else ""
        order = ", ".join(c for c in PARTITION_COLUMNS if c in columns)
        return con.execute(f'SELECT {select} FROM "{table}"{clause} ORDER BY {order}', params).df()


def stored_cycles(store: Path | str, table: str = "cycle_calendar") -> list[str]:
    """The cycles with rows in `table`, oldest first."""
    if not Path(store).exists():
        return []
    with _connect(Path(store), read_only=True) as con:
        if PARTITION_CYCLE not in _columns(con, table):
            return []
        rows = con.execute(f'SELECT DISTINCT {PARTITION_CYCLE} FROM "{table}" ORDER BY 1').fetchall()
    return [r[0] for r in rows]


def report_folder(config: PlanningConfig) -> Path:
    """var/reports/<cycle>/ next to the store: pictures and the HTML report of one cycle."""
    return Path(config.store.path).parent / "reports" / str(config.calendar.cycle_date)


def previous_cycle(store: Path | str, table: str, cycle: str, product_class: str) -> str | None:
    """The latest stored cycle before `cycle` with rows of `product_class` in `table` (None if there is none)."""
    if not Path(store).exists():
        return None
    with _connect(Path(store), read_only=True) as con:
        if not _columns(con, WRITTEN):
            return None
        row = con.execute(
            f"SELECT max({PARTITION_CYCLE}) FROM {WRITTEN} WHERE asset = ? AND {PARTITION_CLASS} = ? AND "
            f"{PARTITION_CYCLE} < ?",
            [table, product_class, cycle],
        ).fetchone()
    return row[0] if row else None
