"""Dagster resources: the planning config and the DuckDB store.

Nothing here reads a file at import time; the config is read when a run first
asks for it.
"""

from __future__ import annotations

import os
from functools import cached_property
from pathlib import Path

import dagster as dg
import duckdb
import pandas as pd

from pipelines.config import PlanningConfig, load_config

DEFAULT_CONFIG = "config/planning.yaml"
CONFIG_ENV = "APPORTION_CONFIG"


class PlanningConfigResource(dg.ConfigurableResource):
    """The validated planning config. `path` defaults to $APPORTION_CONFIG, else config/planning.yaml."""

    path: str = ""

    @cached_property
    def config(self) -> PlanningConfig:
        return load_config(self.path or os.environ.get(CONFIG_ENV, DEFAULT_CONFIG))


class DuckDBStore(dg.ConfigurableIOManager):
    """One DuckDB table per asset, named like the asset, in the file `store.path` of the config.

    Text columns are written as VARCHAR even when every value is missing, so a
    table's types do not depend on its content.
    """

    planning: PlanningConfigResource

    @property
    def path(self) -> Path:
        return Path(self.planning.config.store.path)

    def _connect(self) -> duckdb.DuckDBPyConnection:
        self.path.parent.mkdir(parents=True, exist_ok=True)
        return duckdb.connect(str(self.path))

    def handle_output(self, context: dg.OutputContext, obj: pd.DataFrame) -> None:
        table = context.asset_key.path[-1]
        frame = obj.astype({c: "string" for c in obj.columns if obj[c].dtype == object})
        with self._connect() as con:
            con.register("frame", frame)
            con.execute(f'CREATE OR REPLACE TABLE "{table}" AS SELECT * FROM frame')
            con.unregister("frame")
        context.add_output_metadata({"store_table": dg.MetadataValue.text(f"{self.path}::{table}")})

    def load_input(self, context: dg.InputContext) -> pd.DataFrame:
        table = context.upstream_output.asset_key.path[-1]
        if not self.path.exists():
            raise FileNotFoundError(
                f"store {self.path} does not exist yet; materialize the whole cycle first "
                f"(make demo, or dagster job execute -j weekly_cycle)"
            )
        with duckdb.connect(str(self.path), read_only=True) as con:
            found = con.execute(
                "SELECT count(*) FROM information_schema.tables WHERE table_name = ?", [table]
            ).fetchone()[0]
            if not found:
                raise FileNotFoundError(
                    f"table {table!r} is not in the store {self.path}; materialize asset {table} first"
                )
            return con.execute(f'SELECT * FROM "{table}"').df()


def read_table(store: Path | str, table: str) -> pd.DataFrame:
    """A table of the store, for reports and tests."""
    with duckdb.connect(str(store), read_only=True) as con:
        return con.execute(f'SELECT * FROM "{table}"').df()
