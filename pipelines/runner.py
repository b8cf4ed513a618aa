"""Running the cycle's partitions in-process: the command line and the tests start runs through here."""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass, field

import dagster as dg

from pipelines.errors import ConfigError
from pipelines.jobs import CYCLE_JOB
from pipelines.partitions import partition_key, register_partitions


@dataclass
class CycleRun:
    """The runs of one cycle, one per product class, in the order they ran."""

    cycle: str
    results: dict[str, dg.ExecuteInProcessResult] = field(default_factory=dict)
    seconds: dict[str, float] = field(default_factory=dict)

    @property
    def success(self) -> bool:
        return all(r.success for r in self.results.values())

    def get_asset_check_evaluations(self) -> list[dg.AssetCheckEvaluation]:
        return [e for r in self.results.values() for e in r.get_asset_check_evaluations()]

    def get_asset_materialization_events(self) -> list:
        return [e for r in self.results.values() for e in r.get_asset_materialization_events()]

    @property
    def all_events(self) -> list:
        return [e for r in self.results.values() for e in r.all_events]

    def checks_by_class(self) -> list[tuple[str, dg.AssetCheckEvaluation]]:
        return [(c, e) for c, r in self.results.items() for e in r.get_asset_check_evaluations()]

    @property
    def blocking_checks_pass(self) -> bool:
        """No ERROR check failed (a failed WARN check does not fail the cycle)."""
        return all(e.passed for e in self.get_asset_check_evaluations() if e.severity != dg.AssetCheckSeverity.WARN)


def rebuild_selection(defs: dg.Definitions, first: str) -> list[dg.AssetKey]:
    """`first` and everything downstream of it, with the other outputs of any multi-asset it touches."""
    graph = defs.resolve_asset_graph()
    names = {k.to_user_string() for k in graph.get_all_asset_keys()}
    if first not in names:
        raise ConfigError(f"{first!r} is not an asset; assets are {sorted(names)}")
    wanted = dg.AssetSelection.assets(first).downstream().required_multi_asset_neighbors()
    return sorted(wanted.resolve(graph), key=lambda k: k.to_user_string())


def run_partitions(
    defs: dg.Definitions,
    instance: dg.DagsterInstance,
    cycle: str,
    classes: list[str],
    *,
    all_classes: list[str] | None = None,
    selection: list[dg.AssetKey] | None = None,
    run_config: dict | None = None,
    on_start: Callable[[int, str], None] | None = None,
    on_done: Callable[[str, dg.ExecuteInProcessResult, float], None] | None = None,
) -> CycleRun:
    """Run the cycle job (or `selection`) for each class of `cycle`, one run per partition.

    The cycle and `all_classes` (default `classes`) are registered as partitions
    first, so the runs show in the UI under their partition keys.
    """
    register_partitions(instance, cycle, list(all_classes or classes))
    job = defs.resolve_job_def(CYCLE_JOB)
    run = CycleRun(cycle=cycle)
    for i, product_class in enumerate(classes, 1):
        if on_start:
            on_start(i, product_class)
        started = time.monotonic()
        result = job.execute_in_process(
            run_config=run_config or {},
            instance=instance,
            partition_key=partition_key(cycle, product_class),
            asset_selection=selection,
            raise_on_error=False,
        )
        run.results[product_class] = result
        run.seconds[product_class] = time.monotonic() - started
        if on_done:
            on_done(product_class, result, run.seconds[product_class])
    return run
