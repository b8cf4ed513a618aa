"""The store: a Parquet file per version of each asset partition, cycles published whole.

`pipelines/store/store.py` has the protocol (writing, publication),
`layout.py` the folders, `reading.py` the reads; this module the functions
the rest of the project calls. Readers (summary, explain, the report)
see published cycles only; the pipeline's own steps read the latest versions.
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pyarrow as pa

from pipelines.store.arrow import PARTITION_CLASS, PARTITION_COLUMNS, PARTITION_CYCLE
from pipelines.store.layout import DEFAULT_SHARD, VERSIONS, WRITTEN, StoreError
from pipelines.store.locks import LockBusy
from pipelines.store.store import CycleStatus, PartitionBusy, Store, open_store

__all__ = [
    "DEFAULT_SHARD",
    "PARTITION_CLASS",
    "PARTITION_COLUMNS",
    "PARTITION_CYCLE",
    "VERSIONS",
    "WRITTEN",
    "CycleStatus",
    "LockBusy",
    "PartitionBusy",
    "Store",
    "StoreError",
    "open_store",
    "partition_stored",
    "previous_cycle",
    "read_table",
    "stored_cycles",
    "write_partition",
]


def read_table(
    store: Path | str,
    table: str,
    *,
    cycle: str | None = None,
    product_class: str | None = None,
    with_partition: bool = False,
    where: dict[str, str] | None = None,
    versions: str = "published",
    as_arrow: bool = False,
    shard: str | None = None,
    columns: list[str] | None = None,
) -> pd.DataFrame | pa.Table | None:
    """A table of the store (None when it does not exist), for one cycle and/or class or all of them.

    `versions`: `published` (default; what readers see: the cycles whose every
    class passed its blocking checks, as last published), `complete` (also a
    class's complete versions in a cycle not yet published), `latest` (the
    versions last written, what the pipeline's own steps read). Without
    `with_partition` the partition columns are left out (a frame as the asset
    produced it). `where`: column -> value filters, applied where the table has
    the column. `as_arrow`: an Arrow table instead of a pandas frame. `shard`: one shard of the class only
    (a folder name such as `2of4`; default every shard). `columns`: only these, in this order (a column the
    table lacks is left out), read from the files alone: a large table read for a few of its columns.
    """
    if cycle is not None:
        cycle = str(cycle)
    return open_store(store).read(
        table,
        cycle=cycle,
        product_class=product_class,
        versions=versions,
        with_partition=with_partition,
        where=where,
        as_arrow=as_arrow,
        shard=shard,
        columns=columns,
    )


def write_partition(
    store: Path | str,
    table: str,
    data: pd.DataFrame | pa.Table,
    cycle: str,
    product_class: str,
    *,
    run_id: str | None = None,
) -> dict:
    """Write a new version of one partition of `table` and make it the latest (pointer record returned)."""
    return open_store(store).write(table, cycle, product_class, data, run_id=run_id)


def partition_stored(store: Path | str, table: str, cycle: str, product_class: str, shard: str | None = None) -> bool:
    """Whether the partition (one shard of it, when given) has been written (an empty result counts)."""
    s = open_store(store)
    latest = s.check_layout() and s.latest(table, cycle, product_class)
    return bool(latest) and (shard is None or shard in latest)


def stored_cycles(store: Path | str, table: str = "cycle_calendar") -> list[str]:
    """The published cycles with rows of `table`, oldest first."""
    return open_store(store).cycles(table, versions="published")


def previous_cycle(store: Path | str, table: str, cycle: str, product_class: str) -> str | None:
    """The latest cycle before `cycle` in which `product_class` completed with a partition of `table`."""
    return open_store(store).previous_cycle(table, cycle, product_class)
