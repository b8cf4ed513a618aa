"""Dagster resources: the planning config; the store's functions, re-exported from pipelines/store/.

Nothing here reads a file at import time; the config is read when a run first
asks for it. The IO manager is `pipelines.store.dagster_io.PartitionStore`.
"""

from __future__ import annotations

import os
from functools import cached_property
from pathlib import Path

import dagster as dg

from pipelines.config import PlanningConfig, load_config
from pipelines.store import (  # noqa: F401  (the store's public functions, where callers have found them)
    PARTITION_CLASS,
    PARTITION_COLUMNS,
    PARTITION_CYCLE,
    WRITTEN,
    StoreError,
    partition_stored,
    previous_cycle,
    read_table,
    stored_cycles,
    write_partition,
)

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
