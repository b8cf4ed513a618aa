"""The two phases of a class cut into shards that decides at class level: every shard up to the backtest first,
then every shard from `strategy_choice` on.

A shard's `strategy_choice` (`strategy: auto` or `seasonality: auto`) reads
the backtest of every shard of its class in the cycle, combined
(`assets/strategy_choice.py`, `pipelines.engines.backtest_combine`), so no
shard may pass the backtest before all have made theirs. `run_plan` orders
the runs: the first batch runs every partition not needing it whole and each
such shard up to the backtest (the backtest's assets and what they read);
the second runs those shards on (everything else the run selects), reading
the first phase's tables from the store; when the first batch ran only some
shards of a class (`--class spares~2of8`) and every shard has a backtest, the
second runs all of them, so every shard follows the class's new decision
(`every_shard_on`). Runs of one batch may go at once
(`cycle --parallel K`); the second batch starts when the first has ended, and
runs a class's shards only when all of its first runs succeeded. A class that
needs no class-level step is one run per partition, as before.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import dagster as dg

from pipelines.shards import needs_class_step, partition_classes, split_class_key, store_shards

TO_BACKTEST = "to backtest"
FROM_CHOICE = "from strategy_choice"
BACKTEST = "backtest_accuracy"  # the asset whose run (with its upstream) is the first phase


@dataclass(frozen=True)
class PlannedRun:
    """One run of a partition `key`: the whole selection (`phase` None) or one phase of it."""

    key: str
    phase: str | None = None

    @property
    def label(self) -> str:
        """What the progress lines and the summary call the run: `spares~1of2 (to backtest)`."""
        return self.key if self.phase is None else f"{self.key} ({self.phase})"


def run_plan(config, keys: list[str]) -> list[list[PlannedRun]]:
    """The batches of runs for partition `keys` (in their order); see the module docstring."""
    phased = [k for k in keys if _phased(config, k)]
    first = [PlannedRun(k, TO_BACKTEST if k in phased else None) for k in keys]
    return [first, [PlannedRun(k, FROM_CHOICE) for k in phased]] if phased else [first]


def run_count(config, keys: list[str], graph, wanted: list[dg.AssetKey] | None) -> int:
    """How many runs `run_plan` makes of `keys` for the selection `wanted` (a phase with nothing to run is none;
    a class whose backtest runs again goes on with all its shards, `every_shard_on`)."""
    batches = run_plan(config, keys)
    if len(batches) > 1 and phase_selection(graph, TO_BACKTEST, wanted) != []:
        batches[1] = every_shard_on(config, batches[1], lambda name: set(store_shards(config, name)))
    return sum(phase_selection(graph, r.phase, wanted) != [] for batch in batches for r in batch)


def _phased(config, key: str) -> bool:
    name = split_class_key(key)[0]
    return name in config.product_classes and needs_class_step(config, name)


def phase_selection(
    graph, phase: str | None, wanted: list[dg.AssetKey] | None
) -> list[dg.AssetKey] | None:
    """The assets a run of `phase` materializes out of `wanted` (None: every asset): the backtest and its
    upstream, or the rest; `phase` None: `wanted` itself."""
    if phase is None:
        return wanted
    every = set(graph.get_all_asset_keys()) if wanted is None else set(wanted)
    before = set(dg.AssetSelection.assets(BACKTEST).upstream().required_multi_asset_neighbors().resolve(graph))
    chosen = every & before if phase == TO_BACKTEST else every - before
    return sorted(chosen, key=lambda k: k.to_user_string())


def every_shard_on(config, batch: list[PlannedRun], written: Callable[[str], set[str]]) -> list[PlannedRun]:
    """The second batch widened to every shard of its classes, when the first rewrote some of their backtests
    (`--class spares~2of8`) and every shard has one (`written(class)`: the shards whose backtest the store holds
    for the cycle): the class's decision changed, so each shard follows it again. A class missing a shard's
    backtest is left as it is: its strategy_choice says which shard to run."""
    out = list(batch)
    for name in dict.fromkeys(split_class_key(r.key)[0] for r in batch):
        keys = partition_classes(config, [name])
        if set(store_shards(config, name)) <= written(name):
            have = {r.key for r in out}
            out += [PlannedRun(k, FROM_CHOICE) for k in keys if k not in have]
    return out


def second_batch(batch: list[PlannedRun], succeeded: dict[str, bool]) -> tuple[list[PlannedRun], list[str]]:
    """The runs of the second batch whose class's first runs all succeeded, and the classes held back (a shard
    failed or stopped on a blocking check before its backtest was written: its class cannot decide)."""
    failed = {split_class_key(k)[0] for k, ok in succeeded.items() if not ok}
    keep = [r for r in batch if split_class_key(r.key)[0] not in failed]
    return keep, sorted({split_class_key(r.key)[0] for r in batch} & failed)


def second_runs(config, store, cycle: str, batch: list[PlannedRun], succeeded: dict[str, bool], first_phase,
                say=print) -> list[PlannedRun]:
    """The second batch as it runs: without the classes a first run failed in (saying so through `say`), and
    widened to every shard of a class whose backtest the first rewrote (`first_phase`: its selection, [] none)."""
    batch, held = second_batch(batch, succeeded)
    if held and say:
        say(f"classes {held}: a shard's run up to the backtest failed, so their shards do not go on to "
            "strategy_choice (it needs every shard's backtest); fix it and run the class again")
    if first_phase == []:  # no backtest was rewritten: the decisions stand
        return batch
    return every_shard_on(config, batch, lambda name: set(store.latest(BACKTEST, cycle, name)))
