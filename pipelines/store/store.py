"""The store: one Parquet file per version of an asset partition, and cycles published whole.

Layout under `store.path` (a folder; on a cluster a shared filesystem):

    store.json                                      format marker
    tables/<asset>/_schema.arrow                    union schema of the asset's partitions
    tables/<asset>/cycle=<c>/class=<k>/shard=<s>/<version>.parquet
    tables/<asset>/cycle=<c>/class=<k>/shard=<s>/_latest.json      pointer to the latest version
    catalog/cycle=<c>/class=<k>.json                the class: complete (with its versions) or pending
    catalog/cycle=<c>/published.json                the cycle's publication record (what readers see)
    catalog/cycle=<c>/published.previous.json       the one before (its files stay while readers may hold it)
    catalog/cycle=<c>/pending/class=<k>/shard=<s>.json   a shard to be rewritten, or proven (pending.py)
    cut/cycle=<c>/<fingerprint>/...                 the cycle's history cut by class and shard (input_cut.py)
    locks/partition/cycle=<c>/class=<k>.lock        one writer per partition
    locks/publish.lock                              one publisher at a time
    locks/cut/cycle=<c>.lock                        one cutter of a cycle's history
    published.duckdb                                DuckDB views over the published files, for SQL

Protocol (each step is one atomic rename or single-object write):

1. write: a version is written under a temporary name and renamed into place,
   then the partition's `_latest.json` is replaced to point at it. A writer
   killed at any point leaves the previous version as the latest and at most a
   temporary file, which no reader opens and the next writer deletes.
2. the pipeline's own steps and rebuilds read `_latest.json` (`versions="latest"`).
3. a run that starts a cycle or rebuilds a class marks its classes pending
   (`begin`); the class's last complete versions stay in the publication record.
4. the terminal `publication` asset, downstream of every asset (so blocking
   checks stop it), records the class complete with the versions it used; when
   every class of the cycle is complete it writes `published.json` (under the
   publish lock, since classes may finish together) and rebuilds the views.
5. readers (`summary`, `explain`, the report, SQL) read through `published.json`
   (`versions="published"`): nothing of a cycle shows before every class passed,
   and a failed rerun leaves the published record, and so every reader, as it was.
6. a version is deleted once superseded and referenced by neither the class's
   complete record nor the current or previous publication.

The shards of a class cut into N (`pipelines.shards`) each have their own
`shard=<i>of<N>` folder below the class; a class not cut is shard `0`.
"""

from __future__ import annotations

import datetime as dt
import os
import shutil
import uuid
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from functools import lru_cache
from pathlib import Path

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from pipelines.store import arrow, locks
from pipelines.store.files import TMP_PREFIX, fsync_dir, read_json, stale_tmp, tmp_name, write_atomic, write_json
from pipelines.store.layout import DEFAULT_SHARD, LATEST, SCHEMA, dir_part, dir_value, utc_now
from pipelines.store.reading import StoreReader

PUBLISH_WAIT_SECONDS = 600.0


class PartitionBusy(locks.LockBusy):
    """Another live run writes the partition."""


@dataclass
class CycleStatus:
    """Where a cycle stands: its publication and, per class, complete / pending / not run / being written."""

    cycle: str
    classes: list[str]
    published: dict | None
    records: dict[str, dict] = field(default_factory=dict)
    writing: dict[str, dict] = field(default_factory=dict)

    @property
    def complete(self) -> list[str]:
        return [k for k in self.classes if (self.records.get(k) or {}).get("state") == "complete"]

    @property
    def incomplete(self) -> list[str]:
        return [k for k in self.classes if k not in self.complete]

    @property
    def is_published(self) -> bool:
        return self.published is not None

    @property
    def newer_run_incomplete(self) -> bool:
        """Published, but a later run of some class has not completed (failed, stopped or running)."""
        return self.is_published and bool(self.incomplete)

    def describe_class(self, k: str) -> str:
        if k in self.writing:
            return f"{k}: being written by {locks.describe(self.writing[k])}"
        record = self.records.get(k)
        if record is None:
            return f"{k}: not run"
        if record.get("state") == "complete":
            return f"{k}: complete (run {record.get('run_id')}, {record.get('completed_at', '')[:19]})"
        by = record.get("command") or "a run"
        return f"{k}: not complete ({by} started {record.get('since', '')[:19]}; failed, stopped or still queued)"


class Store(StoreReader):
    """A store folder. Cheap to make; `open_store` caches one per folder."""

    # ---- locks --------------------------------------------------------------------------------
    @contextmanager
    def partition_lock(
        self,
        cycle: str,
        product_class: str,
        *,
        run_id: str | None = None,
        command: str = "",
        wait_seconds: float | None = None,
        say: Callable[[str], None] | None = None,
    ) -> Iterator[locks.HeldLock]:
        """Hold the one-writer lock of partition cycle|class (see locks.acquire for waiting)."""
        self._ensure()
        what = f"partition {cycle}|{product_class}"
        owner = {"run_id": run_id or "", "command": command, "cycle": cycle, "product_class": product_class}
        try:
            held = locks.acquire(
                self.partition_lock_path(cycle, product_class),
                owner,
                what=what,
                wait_seconds=wait_seconds,
                on_wait=say,
                on_stale=say,
            )
        except locks.LockBusy as busy:
            raise PartitionBusy(str(busy), busy.holder) from None
        try:
            yield held
        finally:
            locks.release(held)

    @contextmanager
    def _publish_lock(self, say: Callable[[str], None] | None = None) -> Iterator[None]:
        self._ensure()
        held = locks.acquire(
            self.root / "locks" / "publish.lock",
            {"command": "publish"},
            what="the store's publication",
            wait_seconds=PUBLISH_WAIT_SECONDS,
            on_wait=say,
            on_stale=say,
        )
        try:
            yield
        finally:
            locks.release(held)

    def writer_of(self, cycle: str, product_class: str) -> dict | None:
        """The owner record of the run writing that partition right now, None when nobody does."""
        return locks.holder(self.partition_lock_path(cycle, product_class))

    # ---- schema -------------------------------------------------------------------------------
    def _widen_schema(self, asset: str, new: pa.Schema) -> None:
        current = self.schema(asset)
        if current is not None and arrow.merge_schema(current, new).equals(current):
            return
        path = self.table_dir(asset) / SCHEMA
        held = locks.acquire(
            self.root / "locks" / "schema" / f"{asset}.lock",
            {"command": "schema"},
            what=f"schema of {asset}",
            wait_seconds=120,
        )
        try:
            self._schemas.pop(asset, None)
            merged = arrow.merge_schema(self.schema(asset), new)
            write_atomic(path, merged.serialize().to_pybytes())
        finally:
            locks.release(held)

    # ---- writing ------------------------------------------------------------------------------
    def write(
        self,
        asset: str,
        cycle: str,
        product_class: str,
        data: pd.DataFrame | pa.Table,
        *,
        run_id: str | None = None,
        shard: str = DEFAULT_SHARD,
    ) -> dict:
        """Write a new version of one partition and make it the latest; its pointer record."""
        table = arrow.to_arrow(data, cycle, product_class)  # a frame Arrow cannot take fails here, before any file
        self._ensure()
        folder = self.partition_dir(asset, cycle, product_class, shard)
        folder.mkdir(parents=True, exist_ok=True)
        version = f"{dt.datetime.now(dt.timezone.utc):%Y%m%dT%H%M%S%f}-{uuid.uuid4().hex[:8]}"
        final = folder / f"{version}.parquet"
        tmp = folder / tmp_name(final.name)
        try:
            pq.write_table(table, tmp, metadata_collector=None)
            with open(tmp, "rb+") as f:
                os.fsync(f.fileno())
            os.replace(tmp, final)
        except BaseException:
            tmp.unlink(missing_ok=True)
            raise
        fsync_dir(folder)
        self._widen_schema(asset, table.schema)
        pointer = {
            "asset": asset,
            "cycle": cycle,
            "product_class": product_class,
            "shard": shard,
            "file": final.name,
            "rows": table.num_rows,
            "bytes": final.stat().st_size,
            "run_id": run_id or "",
            "written_at": utc_now(),
        }
        before = read_json(folder / LATEST)
        write_json(folder / LATEST, pointer)
        if before and before.get("file") != final.name:
            keep = self._referenced(asset, cycle, product_class, shard) | {final.name}
            if before["file"] not in keep:
                (folder / before["file"]).unlink(missing_ok=True)
        self._drop_dead_tmp(folder)
        return pointer

    def _drop_dead_tmp(self, folder: Path) -> None:
        for path in folder.iterdir():
            if path.name.startswith(TMP_PREFIX) and stale_tmp(path):
                path.unlink(missing_ok=True)

    def _referenced(self, asset: str, cycle: str, product_class: str, shard: str) -> set[str]:
        """Files of that partition a class record or the current or previous publication points at."""
        found = set()
        records = [read_json(self.class_record_path(cycle, product_class))]
        for previous in (False, True):
            pub = read_json(self.published_path(cycle, previous)) or {}
            records.append((pub.get("classes") or {}).get(product_class))
        for record in records:
            entry = ((record or {}).get("tables") or {}).get(asset, {}).get(shard)
            if entry:
                found.add(entry["file"])
        return found

    def prune(self, cycle: str, product_class: str) -> list[Path]:
        """Delete the superseded versions of one partition; call while holding its lock. The files deleted."""
        gone = []
        for table_dir in sorted((self.root / "tables").glob("*")):
            class_dir = table_dir / dir_part("cycle", cycle) / dir_part("class", product_class)
            if not class_dir.is_dir():
                continue
            for shard_dir in class_dir.iterdir():
                shard = dir_value(shard_dir.name)
                latest = (read_json(shard_dir / LATEST) or {}).get("file")
                keep = self._referenced(table_dir.name, cycle, product_class, shard) | {latest}
                for path in shard_dir.iterdir():
                    dead = path.suffix == ".parquet" and not path.name.startswith(TMP_PREFIX) and path.name not in keep
                    if dead or (path.name.startswith(TMP_PREFIX) and stale_tmp(path)):
                        path.unlink(missing_ok=True)
                        gone.append(path)
        return gone

    # ---- publication --------------------------------------------------------------------------
    def begin(self, cycle: str, classes: list[str], *, command: str, run_id: str = "") -> None:
        """Mark `classes` of `cycle` pending: a run is about to rewrite them, so their last complete
        versions no longer count towards a new publication (the current one stays as it is)."""
        with self._publish_lock():
            for k in classes:
                write_json(
                    self.class_record_path(cycle, k),
                    {
                        "state": "pending",
                        "cycle": cycle,
                        "product_class": k,
                        "command": command,
                        "run_id": run_id,
                        "since": utc_now(),
                    },
                )

    def complete_class(
        self,
        cycle: str,
        product_class: str,
        tables: dict[str, dict[str, dict]],
        *,
        run_id: str,
        classes: list[str],
        say: Callable[[str], None] | None = None,
    ) -> CycleStatus:
        """Record the class complete with `tables` (asset -> shard -> pointer); publish the cycle when
        every class of `classes` is complete. Call while holding the partition's lock."""
        with self._publish_lock(say):
            write_json(
                self.class_record_path(cycle, product_class),
                {
                    "state": "complete",
                    "cycle": cycle,
                    "product_class": product_class,
                    "run_id": run_id,
                    "completed_at": utc_now(),
                    "tables": tables,
                },
            )
            status = self.status(cycle, classes)
            if not status.incomplete:
                current = self.published(cycle)
                if current is not None:
                    write_json(self.published_path(cycle, previous=True), current)
                write_json(
                    self.published_path(cycle),
                    {
                        "cycle": cycle,
                        "published_at": utc_now(),
                        "sequence": int((current or {}).get("sequence", 0)) + 1,
                        "classes": {k: status.records[k] for k in classes},
                    },
                )
                status.published = self.published(cycle)
                self.refresh_views()
        self.prune(cycle, product_class)
        return status

    def status(self, cycle: str, classes: list[str]) -> CycleStatus:
        records = {k: r for k in classes if (r := self.class_record(cycle, k)) is not None}
        writing = {k: h for k in classes if (h := self.writer_of(cycle, k)) is not None}
        return CycleStatus(
            cycle=cycle, classes=list(classes), published=self.published(cycle), records=records, writing=writing
        )

    def refresh_views(self) -> Path:
        from pipelines.store.views import write_views

        return write_views(self)


@lru_cache(maxsize=32)
def _open(root: str) -> Store:
    return Store(root)


def open_store(root: Path | str) -> Store:
    """The Store of a folder (one object per folder and process, so schemas are read once)."""
    return _open(str(Path(root).absolute()))


def remove_store(root: Path | str) -> None:
    """Delete a store folder (tests and `make clean`)."""
    shutil.rmtree(root, ignore_errors=True)
    _open.cache_clear()
