"""A cycle's tables made by the stages' own runs, in graph order, without Dagster: correct outputs to corrupt.

`run_partition` calls each stage's `run` exactly as its asset does (the specs
of `assets.factory.SPECS`, the partition's narrowed config, every output
validated by its pandera model before the next stage reads it), for one cycle
and product class, and returns every table by name. Without `backtest` the
backtest is left out (its table is empty), so the class's strategy must be
configured, not `auto`. The share drift, which reads the class's previous
cycle from the store, is given this cycle's own share table as the previous
one; the report's files are made but not written.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import pandas as pd
import yaml

from pipelines.config import PlanningConfig, parse_config
from pipelines.partitions import narrow_config
from pipelines.tables import MODELS

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "data" / "demo"


@dataclass
class PartitionRun:
    config: PlanningConfig  # the partition's narrowed config
    tables: dict[str, pd.DataFrame]
    settings: dict[str, object]  # stage (first table) -> the settings object its run got


def demo_config(classes: dict[str, dict] | None = None, **sections) -> PlanningConfig:
    """config/planning.yaml over the demo data; `classes` updates product classes' keys (e.g. a strategy), the other
    keyword arguments replace whole sections (e.g. backtest)."""
    data = yaml.safe_load((ROOT / "config" / "planning.yaml").read_text())
    data["inputs"]["folder"] = str(DEMO)
    for name, keys in (classes or {}).items():
        data["product_classes"][name].update(keys)
    data.update(sections)
    return parse_config(data, ROOT / "config" / "planning.yaml")


def run_partition(
    config: PlanningConfig, cycle: str, product_class: str, backtest: bool = False, *, upto: str | None = None,
    done: dict[str, pd.DataFrame] | None = None, read: dict[str, dict] | None = None,
) -> PartitionRun:
    """The partition's tables. `upto`: stop after the stage whose first table it is; `done`: the tables of an
    earlier call (their stages are not run again); `read`: stage (first table) -> inputs given in place of its
    own, as an asset's store read gives them (a sharded class's strategy_choice: the shards' backtests combined)."""
    from assets.factory import Partition, graph_order
    from pipelines import definitions  # noqa: F401  (makes every stage asset, so SPECS holds them all)
    from pipelines.shards import shard_of, split_class_key

    name = split_class_key(product_class)[0]  # a shard's key (`spares~2of3`) runs that shard of its class
    part = Partition(narrow_config(config, cycle, product_class), config, cycle, name, shard_of(config, product_class))
    tables: dict[str, pd.DataFrame] = dict(done or {})
    settings: dict[str, object] = {}
    for spec in graph_order():
        first = spec.tables[0].name
        if all(t.name in tables for t in spec.tables):
            continue
        if first == "backtest_accuracy" and not backtest:
            for table in spec.tables:  # the accuracy, losses and share tuning: all empty
                columns = MODELS[table.name].to_schema().columns
                tables[table.name] = pd.DataFrame({c: pd.Series(dtype=object) for c in columns})
            continue
        frames = {**{name: tables[name] for name in spec.ins}, **(read or {}).get(first, {})}
        if first == "share_drift":
            frames.update(previous=tables["share_tables"], previous_cycle=cycle)
        if first == "statistical_forecast" and part.shard is not None:  # the asset reads the shard's calendar
            settings[first] = shard_forecast_settings(part, tables["cycle_calendar"])  # from the store; here given
        else:
            settings[first] = spec.settings(part)
        result = spec.run(**frames, settings=settings[first])
        for table in spec.tables:
            tables[table.name] = MODELS[table.name].validate(result.outputs[table.name])
        if first == upto:
            break
    return PartitionRun(part.config, tables, settings)


def shard_forecast_settings(part, calendar: pd.DataFrame):
    """A shard's forecast settings as `assets.statistical_forecast.forecast_settings` makes them, from its
    cycle_calendar given here rather than read from the store."""
    import dataclasses

    from pipelines.calendar import period_ordinal
    from pipelines.stages.statistical_forecast import ForecastSettings

    settings = ForecastSettings.of(part.config)
    first = int(period_ordinal(pd.DatetimeIndex([calendar["history_start"].iloc[0]]), settings.period)[0])
    return dataclasses.replace(settings, residual_start=first)
