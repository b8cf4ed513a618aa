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

import functools
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


@dataclass
class ClassStepRuns:
    whole: PartitionRun  # the class as one partition
    shards: list[PartitionRun]  # each shard's two phases, the second given the combined backtest
    accuracy: pd.DataFrame  # the shards' backtest_accuracy combined
    losses: pd.DataFrame  # their backtest_losses combined


def class_step_runs(config_whole: PlanningConfig, config_cut: PlanningConfig, cycle: str, name: str) -> ClassStepRuns:
    """Class `name` whole, and cut into shards (`config_cut`) run as the command line runs a class that decides at
    class level: every shard up to the backtest, the shards' backtests combined, then every shard on from
    strategy_choice with the combined tables (as `assets.strategy_choice.choice_inputs` reads them)."""
    from pipelines.engines.backtest_combine import combine_accuracy, combine_losses
    from pipelines.shards import partition_classes

    whole = run_partition(config_whole, cycle, name, backtest=True)
    keys = partition_classes(config_cut, [name])
    first = [run_partition(config_cut, cycle, k, backtest=True, upto="backtest_accuracy") for k in keys]
    accuracy = combine_accuracy([r.tables["backtest_accuracy"] for r in first])
    losses = combine_losses([r.tables["backtest_losses"] for r in first])
    given = {"strategy_choice": {"backtest_accuracy": accuracy, "backtest_losses": losses}}
    shards = [run_partition(config_cut, cycle, k, backtest=True, done=r.tables, read=given)
              for k, r in zip(keys, first, strict=True)]
    return ClassStepRuns(whole, shards, accuracy, losses)


# what a shard cannot decide alone, fixed: a strategy, a window and method, no seasonality group (no upper levels:
# `sharded_demo_file`), so `spares` may be cut into shards
FIXED = {
    "consumables": {"seasonality": "none"},
    "seasonal": {"window": 52, "method": "pooled", "strategy": "top_down", "seasonality": "none"},
    "spares": {"strategy": "mint_shrink", "seasonality": "none"},
}


def sharded_demo_file(folder: Path, spares: dict | None = None, **sections) -> str:
    """The demo's config file written in `folder` (its store there): FIXED classes, no upper levels, `spares` in
    two shards with `spares` keys over them; `sections`: top-level sections updated (backtest, scale...)."""
    data = yaml.safe_load((ROOT / "config" / "planning.yaml").read_text())
    data["inputs"]["folder"] = str(DEMO)
    data["store"]["path"] = str(folder / "store")
    data["hierarchy"] = {"upper_levels": []}
    for name, keys in FIXED.items():
        data["product_classes"][name].update(keys)
    data["product_classes"]["spares"].update({"scale": {"shards": 2}, **(spares or {})})
    for name, keys in sections.items():
        data[name] = {**(data.get(name) or {}), **keys}
    path = folder / "planning.yaml"
    path.write_text(yaml.safe_dump(data))
    return str(path)


# the demo with `spares` deciding its strategy by the backtest (auto) and every other class fixed, no upper levels
SPARES_AUTO = {
    "consumables": {"seasonality": "none"},
    "seasonal": {"window": 52, "method": "pooled", "strategy": "top_down", "seasonality": "none"},
    "spares": {"strategy": "auto", "seasonality": "none"},
}


@functools.cache
def spares_auto_runs(shards: int = 8, cycle: str = "2026-11-30") -> ClassStepRuns:
    """`class_step_runs` of the demo's spares (SPARES_AUTO) whole and in `shards` shards, made once a session."""
    whole = demo_config(SPARES_AUTO, hierarchy={"upper_levels": []})
    cut = demo_config(SPARES_AUTO, hierarchy={"upper_levels": []}, scale={"shards": shards})
    return class_step_runs(whole, cut, cycle, "spares")
