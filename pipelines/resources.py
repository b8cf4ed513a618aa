"""Dagster resources: the planning config and the IO manager over the store; the store's functions re-exported.

Nothing here reads a file at import time; the config is read when a run first
asks for it.

`PartitionStore` writes every asset output as a new version of its partition
and loads inputs from the latest versions. For the whole run it holds the
partition's one-writer lock (taken when the run's resources are set up,
released when they are torn down; the kernel releases it when the run's
process dies), and it marks the class pending: a run rewriting it means the
class's last complete versions no longer count towards a publication (a
shard's run marks its shard too, `pipelines/store/pending.py`, so the class
waits for it even when the run was started from the UI). A
shard's partition (`seasonal~2of4`, `pipelines.shards`) is the class's
`shard=2of4` folder: its run writes and reads that shard alone, under a
lock of its own, so the shards of a class run at once.
"""

from __future__ import annotations

import os
from functools import cached_property
from pathlib import Path
from typing import Any

import dagster as dg
import pandas as pd
import pyarrow as pa
from pydantic import PrivateAttr

from pipelines.config import PlanningConfig, load_config
from pipelines.partitions import split_key
from pipelines.shards import split_class_key
from pipelines.store import (  # noqa: F401  (the store's public functions, where callers have found them)
    PARTITION_CLASS,
    PARTITION_COLUMNS,
    PARTITION_CYCLE,
    WRITTEN,
    PartitionBusy,
    StoreError,
    open_store,
    partition_stored,
    previous_cycle,
    read_table,
    stored_cycles,
    write_partition,
)
from pipelines.store.dagster_io import PARTITION_TAG, process_tags
from pipelines.store.pending import mark_pending, shard_mark

DEFAULT_CONFIG = "config/planning.yaml"
CONFIG_ENV = "APPORTION_CONFIG"


class PlanningConfigResource(dg.ConfigurableResource):
    """The validated planning config. `path` defaults to $APPORTION_CONFIG, else config/planning.yaml."""

    path: str = ""

    @cached_property
    def config(self) -> PlanningConfig:
        return load_config(self.path or os.environ.get(CONFIG_ENV, DEFAULT_CONFIG))


def report_folder(config: PlanningConfig) -> Path:
    """var/reports/<cycle>/ next to the store: pictures and the HTML report of one cycle."""
    return Path(config.store.path).parent / "reports" / str(config.calendar.cycle_date)


class PartitionStore(dg.ConfigurableIOManager):
    """Each output a new version of its partition in the store folder `store.path`; inputs the latest versions.

    A partition's table holds the frame as the asset produced it, with the
    columns `partition_cycle` and `partition_class` in front; reading a
    partition returns the frame without them. See pipelines/store/store.py for
    the layout and the publication protocol.
    """

    planning: PlanningConfigResource
    _lock: Any = PrivateAttr(default=None)

    @property
    def path(self):
        return self.planning.config.store.path

    @property
    def store(self):
        return open_store(self.path)

    def setup_for_execution(self, context: dg.InitResourceContext) -> None:
        run = context.run
        key = run.tags.get(PARTITION_TAG) if run is not None else None
        if not key:
            return
        mine = process_tags()
        if context.instance is not None and any(run.tags.get(k) != v for k, v in mine.items()):
            context.instance.add_run_tags(run.run_id, mine)
        cycle, class_key = split_key(key)
        product_class = split_class_key(class_key)[0]
        wait = self.planning.config.store.lock_wait_minutes * 60
        log = context.log

        def say(message: str) -> None:
            if log is not None:
                log.warning(message)

        lock = self.store.partition_lock(
            cycle, class_key, run_id=run.run_id, command=f"run of {run.job_name}", wait_seconds=wait, say=say
        )
        try:
            lock.__enter__()
        except PartitionBusy as busy:
            raise PartitionBusy(
                f"{busy}; this run stops (store.lock_wait_minutes is {wait / 60:g})", busy.holder
            ) from None
        self._lock = lock
        record = self.store.class_record(cycle, product_class) or {}
        if record.get("state") != "pending" or record.get("run_id") != run.run_id:
            self.store.begin(cycle, [product_class], command=f"run of {run.job_name}", run_id=run.run_id)
        mark = shard_mark(self.store, cycle, *split_class_key(class_key)) or {}
        if mark.get("run_id") != run.run_id:  # a shard's run: its old versions no longer count (store/pending.py)
            mark_pending(self.store, cycle, [split_class_key(class_key)], command=f"run of {run.job_name}",
                         run_id=run.run_id)

    def teardown_after_execution(self, context: dg.InitResourceContext) -> None:
        if self._lock is not None:
            lock, self._lock = self._lock, None
            lock.__exit__(None, None, None)

    def handle_output(self, context: dg.OutputContext, obj) -> None:
        table = context.asset_key.path[-1]
        cycle, key = split_key(context.asset_partition_key)
        product_class, shard = split_class_key(key)
        pointer = self.store.write(table, cycle, product_class, obj, run_id=context.run_id, shard=shard)
        folder = self.store.partition_dir(table, cycle, product_class, pointer["shard"])
        context.add_output_metadata(
            {
                "store_file": dg.MetadataValue.path(str(folder / pointer["file"])),
                "store_query": dg.MetadataValue.text(
                    f"SELECT * FROM {table} WHERE partition_cycle = '{cycle}' AND partition_class = '{product_class}'"
                    f"  -- in {self.store.views_path} once the cycle is published"
                ),
            }
        )

    def load_input(self, context: dg.InputContext) -> pd.DataFrame:
        table = context.upstream_output.asset_key.path[-1]
        cycle, key = split_key(context.asset_partition_key)
        product_class, shard = split_class_key(key)
        if not partition_stored(self.path, table, cycle, product_class, shard):
            raise FileNotFoundError(
                f"partition {cycle}|{key} of {table!r} is not in the store {self.path}; materialize {table} "
                f"for that partition first (python -m pipelines cycle --cycle {cycle} --class {key})"
            )
        # an input annotated as a pyarrow Table gets one (columnar stages), any other a pandas frame
        wants_arrow = getattr(context.dagster_type, "typing_type", None) is pa.Table
        return read_table(
            self.path, table, cycle=cycle, product_class=product_class, versions="latest", as_arrow=wants_arrow,
            shard=shard,
        )
