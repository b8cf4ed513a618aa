"""The partitions of the cycle: every asset is partitioned by cycle x product class.

- `cycle`: the cycle date (ISO, the first period forecast), added when a cycle
  is started (command line, schedule or sensor), so each cycle's
  outputs are kept side by side in the store and a past cycle can be rerun.
- `product_class`: the classes of the planning config, added from the config
  at the same time, so a planner can rebuild one class without touching the
  others.

Both dimensions are dynamic: their keys come from the config and the data,
which are read when a cycle starts, never at import time. A partition's run
sees the planning config narrowed to its cycle date and its class
(`narrow_config`, called by `assets.factory`), so the stages need not know about partitions.

A class cut into shards (`scale.shards`, `pipelines.shards`) has one
product-class key per shard (`seasonal~2of4`); `register_partitions` is
given the keys of `pipelines.shards.partition_classes`.
"""

from __future__ import annotations

import datetime as dt
import time
from collections.abc import Iterator
from contextlib import contextmanager

import dagster as dg
import pandas as pd

from pipelines.calendar import is_period_start
from pipelines.config import PlanningConfig
from pipelines.errors import ConfigError
from pipelines.shards import split_class_key

CYCLE = "cycle"
PRODUCT_CLASS = "product_class"

cycle_partitions = dg.DynamicPartitionsDefinition(name=CYCLE)
class_partitions = dg.DynamicPartitionsDefinition(name=PRODUCT_CLASS)
cycle_class_partitions = dg.MultiPartitionsDefinition({CYCLE: cycle_partitions, PRODUCT_CLASS: class_partitions})


def partition_key(cycle: str | dt.date | pd.Timestamp, product_class: str) -> dg.MultiPartitionKey:
    """The partition key of one class in one cycle (cycle as an ISO date)."""
    return dg.MultiPartitionKey({CYCLE: cycle_key(cycle), PRODUCT_CLASS: product_class})


def cycle_key(cycle: str | dt.date | pd.Timestamp) -> str:
    return pd.Timestamp(cycle).date().isoformat()


def split_key(key: str | dg.MultiPartitionKey) -> tuple[str, str]:
    """(cycle, product_class) of a partition key such as '2026-11-30|seasonal'."""
    if isinstance(key, dg.MultiPartitionKey):
        dims = key.keys_by_dimension
        return dims[CYCLE], dims[PRODUCT_CLASS]
    cycle, _, product_class = str(key).partition("|")
    if not product_class:
        raise ConfigError(f"partition key {key!r} is not of the form CYCLE|PRODUCT_CLASS, e.g. 2026-11-30|seasonal")
    return cycle, product_class


def narrow_config(config: PlanningConfig, cycle: str, product_class: str) -> PlanningConfig:
    """The config of one partition: calendar.cycle_date set to `cycle`, only `product_class` kept (a shard's key
    `seasonal~2of4` keeps its class).

    Raises a ConfigError naming the file when the class is not configured or
    the cycle date does not start a period, so a stale partition key (a class
    removed from the config) fails with a message, not a KeyError.
    """
    product_class = split_class_key(product_class)[0]
    if product_class not in config.product_classes:
        raise ConfigError(
            f"{config.source}: partition product class {product_class!r} is not under product_classes "
            f"(configured: {sorted(config.product_classes)}). Materialize a configured class, or add the class back."
        )
    try:
        day = dt.date.fromisoformat(cycle)
    except ValueError:
        raise ConfigError(f"partition cycle {cycle!r} is not an ISO date (YYYY-MM-DD)") from None
    if not is_period_start(day, config.calendar.period):
        raise ConfigError(
            f"partition cycle {cycle} does not start a {config.calendar.period} (calendar.period in {config.source})"
        )
    calendar = config.calendar.model_copy(update={"cycle_date": day})
    classes = {product_class: config.product_classes[product_class]}
    narrowed = config.model_copy(update={"calendar": calendar, "product_classes": classes})
    narrowed._source = config.source
    return narrowed


def register_partitions(instance: dg.DagsterInstance, cycle: str, classes: list[str]) -> None:
    """Add the cycle and the classes as partition keys (adding an existing key is a no-op).

    Safe when runs start together: Dagster reads the known keys, then inserts
    the new ones, so two processes may both insert a key and the second hits
    the table's unique constraint (or, on SQLite, a busy database). That
    process reads the keys again and adds what is still missing.
    """
    _add_keys(instance, CYCLE, [cycle])
    _add_keys(instance, PRODUCT_CLASS, list(classes))


RACE_MESSAGES = ("unique constraint", "duplicate key", "integrityerror", "database is locked")
REGISTER_ATTEMPTS = 20


def _add_keys(instance: dg.DagsterInstance, name: str, keys: list[str]) -> None:
    for attempt in range(REGISTER_ATTEMPTS):
        known = set(instance.get_dynamic_partitions(name))
        new = [k for k in dict.fromkeys(keys) if k not in known]
        if not new:
            return
        try:
            instance.add_dynamic_partitions(name, new)
            return
        except Exception as err:  # the storage's own error class (sqlite3, sqlalchemy, psycopg2) varies
            text = f"{type(err).__name__} {err}".lower()
            if attempt == REGISTER_ATTEMPTS - 1 or not any(m in text for m in RACE_MESSAGES):
                raise
            time.sleep(0.02 * (attempt + 1))


def current_cycle(config: PlanningConfig, requested: str | None = None) -> str:
    """The cycle to run: `requested` (an ISO date), else calendar.cycle_date, else the period after the history.

    Raises a ConfigError when the history holds no dated line or the date does
    not start a period.
    """
    from pipelines.calendar import LATEST_COMPLETE_PERIOD, resolve_cycle_date
    from pipelines.engines.history_files import latest_cycle_date

    period = config.calendar.period
    setting = requested or config.calendar.cycle_date
    if setting == LATEST_COMPLETE_PERIOD:
        after = latest_cycle_date(config.inputs.folder, period, config.inputs)
        if after is None:
            where = (
                f"the history query {config.inputs.history.describe()} returns no"
                if config.inputs.history is not None
                else f"no history file in {config.inputs.folder} has a"
            )
            raise ConfigError(
                f"{config.source}: calendar.cycle_date is {LATEST_COMPLETE_PERIOD!r} but {where} dated line; "
                f"load history or give --cycle YYYY-MM-DD."
            )
        return cycle_key(after)
    return cycle_key(resolve_cycle_date(setting, None, period, str(config.source)))


@contextmanager
def known_partitions(instance: dg.DagsterInstance) -> Iterator[None]:
    """While a run executes: `instance.has_dynamic_partition` answers a key it found once without asking again.

    Dagster asks the instance whether the run's cycle and class keys exist for
    every input of every step (752 queries for one class of the demo, two
    SQLite connections each: about a tenth of a small run's cpu). The keys are
    registered before the run starts (`register_partitions`) and nothing here
    deletes one during it, so a key found stays found; a key not found is asked
    again each time. The instance is as before when the block ends.
    """
    if "has_dynamic_partition" in vars(instance):  # already inside such a block
        yield
        return
    ask, found = instance.has_dynamic_partition, set()

    def has_dynamic_partition(partitions_def_name: str, partition_key: str) -> bool:
        if (partitions_def_name, partition_key) in found:
            return True
        if ask(partitions_def_name, partition_key):
            found.add((partitions_def_name, partition_key))
            return True
        return False

    instance.has_dynamic_partition = has_dynamic_partition
    try:
        yield
    finally:
        del instance.has_dynamic_partition
