"""The store's layout: its file names, the folder of every table, partition and record, its format marker.

The layout and the protocol it serves are described in `pipelines/store/store.py`.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path
from urllib.parse import quote, unquote

import pyarrow as pa

from pipelines.errors import PlanningError
from pipelines.store.files import read_json, write_json

FORMAT = "apportion-store"
FORMAT_VERSION = 1
DEFAULT_SHARD = "0"
LATEST = "_latest.json"
SCHEMA = "_schema.arrow"
VIEWS = "published.duckdb"
WRITTEN = "partitions_written"  # the store's own table: every partition with its rows, time and run
VERSIONS = ("published", "complete", "latest")


class StoreError(PlanningError):
    """The store cannot give what was asked (a store of an older layout, a column that changed type)."""


def utc_now() -> str:
    """Now in UTC, ISO 8601 with microseconds (the time stamps of pointers and records)."""
    return dt.datetime.now(dt.timezone.utc).isoformat(timespec="microseconds")


def dir_part(name: str, value: str) -> str:
    """A folder name `name=<value>`, the value quoted so any class or cycle name is one path part."""
    return f"{name}={quote(str(value), safe='')}"


def dir_value(part: str) -> str:
    """The value of a `name=<value>` folder name."""
    return unquote(part.split("=", 1)[1])


class StoreLayout:
    """Where everything of a store folder lives, and whether the folder is a store of this layout."""

    def __init__(self, root: Path | str):
        self.root = Path(root)
        self._schemas: dict[str, tuple[tuple[int, int], pa.Schema]] = {}

    # ---- layout -------------------------------------------------------------------------------
    def table_dir(self, asset: str) -> Path:
        return self.root / "tables" / asset

    def partition_dir(self, asset: str, cycle: str, product_class: str, shard: str = DEFAULT_SHARD) -> Path:
        class_dir = self.table_dir(asset) / dir_part("cycle", cycle) / dir_part("class", product_class)
        return class_dir / dir_part("shard", shard)

    def cycle_dir(self, cycle: str) -> Path:
        return self.root / "catalog" / dir_part("cycle", cycle)

    def class_record_path(self, cycle: str, product_class: str) -> Path:
        return self.cycle_dir(cycle) / f"{dir_part('class', product_class)}.json"

    def published_path(self, cycle: str, previous: bool = False) -> Path:
        return self.cycle_dir(cycle) / ("published.previous.json" if previous else "published.json")

    def partition_lock_path(self, cycle: str, product_class: str) -> Path:
        folder = self.root / "locks" / "partition" / dir_part("cycle", cycle)
        return folder / f"{dir_part('class', product_class)}.lock"

    @property
    def views_path(self) -> Path:
        return self.root / VIEWS

    def check_layout(self) -> bool:
        """True when the store folder exists; raises StoreError for a store of another layout."""
        if not self.root.exists():
            return False
        if self.root.is_file():
            raise StoreError(
                f"store.path {self.root} is one DuckDB file, the store layout of earlier releases; the store is now a "
                f"folder of Parquet files. Set store.path to a folder (the default is var/store) and rerun the cycle "
                f"(python -m pipelines cycle --backfill 1) to write it there; the old file is left as it is."
            )
        marker = read_json(self.root / "store.json")
        if marker is not None and (marker.get("format") != FORMAT or int(marker.get("version", 0)) > FORMAT_VERSION):
            raise StoreError(
                f"the store {self.root} was written in layout {marker.get('format')} v{marker.get('version')}, which "
                f"this release (v{FORMAT_VERSION}) cannot read; rerun the cycle into a new store.path folder"
            )
        return True

    def _ensure(self) -> None:
        if not self.check_layout():
            self.root.mkdir(parents=True, exist_ok=True)
        if not (self.root / "store.json").exists():
            write_json(self.root / "store.json", {"format": FORMAT, "version": FORMAT_VERSION})
