"""Running the cycle's partitions: the command line and the tests start runs through here.

`run_partitions` runs one partition after another in this process (tests and
`cycle` without --parallel); `run_partitions_parallel` runs up to K at once,
one process each (`cycle --parallel K`). Either way each run holds its
partition's one-writer lock in the store for as long as it runs, and the
classes are marked pending first, so the cycle is published only when every
one of them completed again. A class cut into shards that decides at class
level runs each shard in two phases, every shard up to the backtest before any
goes on (`pipelines.phases`).
"""

from __future__ import annotations

import gc
import multiprocessing
import os
import sys
import time
import uuid
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import dagster as dg

from pipelines.errors import ConfigError, PlanningError
from pipelines.jobs import CYCLE_JOB
from pipelines.partitions import known_partitions, partition_key, register_partitions
from pipelines.phases import TO_BACKTEST, PlannedRun, phase_selection, run_plan, second_runs
from pipelines.shards import split_class_key
from pipelines.store.dagster_io import process_tags
from pipelines.store.pending import mark_pending


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


@dataclass
class PartitionOutcome:
    """What the command line reports of one partition's run, whichever process ran it."""

    product_class: str
    run_id: str
    success: bool
    seconds: float
    checks: list[dg.AssetCheckEvaluation]
    failures: list[tuple[str, str]]  # (step, message)
    exit_code: int = 0  # of its process (--parallel): 2 when the partition was busy or the input bad
    failure_kinds: list[str] = field(default_factory=list)  # per failed step: bad_input, check or crash

    @classmethod
    def from_result(cls, product_class: str, result: dg.ExecuteInProcessResult, seconds: float) -> PartitionOutcome:
        return cls(
            product_class,
            result.run_id,
            result.success,
            seconds,
            result.get_asset_check_evaluations(),
            [_failure(e) for e in result.all_events if e.is_step_failure],
            failure_kinds=[failure_kind(e) for e in result.all_events if e.is_step_failure],
        )

    @classmethod
    def from_instance(
        cls, product_class: str, instance: dg.DagsterInstance, run_id: str, seconds: float
    ) -> PartitionOutcome:
        run = instance.get_run_by_id(run_id)
        if run is None:
            return cls(
                product_class,
                run_id,
                False,
                seconds,
                [],
                [("start", "the run was not created (see the messages above)")],
            )
        checks = [
            e.dagster_event.event_specific_data
            for e in instance.all_logs(run_id, of_type=dg.DagsterEventType.ASSET_CHECK_EVALUATION)
        ]
        steps = [e.dagster_event for e in instance.all_logs(run_id, of_type=dg.DagsterEventType.STEP_FAILURE)]
        failures = [_failure(e) for e in steps]
        if run.status != dg.DagsterRunStatus.SUCCESS and not failures:
            failures = [("run", f"ended {run.status.value}")]
        success = run.status == dg.DagsterRunStatus.SUCCESS
        kinds = [failure_kind(e) for e in steps]
        return cls(product_class, run_id, success, seconds, checks, failures, failure_kinds=kinds)


def _failure(event) -> tuple[str, str]:
    error = event.event_specific_data.error
    message = error.cause.message if error and error.cause else (error.message if error else event.message)
    return event.step_key or "run", (message or "").strip()


def failure_kind(event) -> str:
    """Why a step failed: `bad_input` (a PlanningError), `check` (a blocking check failed) or `crash` (else)."""
    names = {c.__name__ for c in _subclasses(PlanningError)}
    error = event.event_specific_data.error
    while error is not None:
        if error.cls_name in names:
            return "bad_input"
        if "AssetCheck" in (error.cls_name or ""):
            return "check"
        error = error.cause
    return "crash"


def _subclasses(cls) -> list[type]:
    return [cls] + [s for c in cls.__subclasses__() for s in _subclasses(c)]


def blocking_checks_pass(outcomes: list[PartitionOutcome]) -> bool:
    return all(e.passed for o in outcomes for e in o.checks if e.severity != dg.AssetCheckSeverity.WARN)


def rebuild_selection(defs: dg.Definitions, first: str) -> list[dg.AssetKey]:
    """`first` and everything downstream of it, with the other outputs of any multi-asset it touches."""
    graph = defs.resolve_asset_graph()
    names = {k.to_user_string() for k in graph.get_all_asset_keys()}
    if first not in names:
        raise ConfigError(f"{first!r} is not an asset; assets are {sorted(names)}")
    wanted = dg.AssetSelection.assets(first).downstream().required_multi_asset_neighbors()
    return sorted(wanted.resolve(graph), key=lambda k: k.to_user_string())


def class_names(keys: list[str]) -> list[str]:
    """The classes of product-class partition keys (a shard's key `seasonal~2of4` is class `seasonal`), once each."""
    return list(dict.fromkeys(split_class_key(k)[0] for k in keys))


def store_of(defs: dg.Definitions):
    """The store the definitions' IO manager writes."""
    return defs.resources["io_manager"].store


def run_partitions(
    defs: dg.Definitions,
    instance: dg.DagsterInstance,
    cycle: str,
    classes: list[str],
    *,
    all_classes: list[str] | None = None,
    selection: list[dg.AssetKey] | None = None,
    run_config: dict | None = None,
    on_start: Callable[[int, str, str], None] | None = None,
    on_done: Callable[[str, dg.ExecuteInProcessResult, float], None] | None = None,
    wait_seconds: float | None = None,
    say: Callable[[str], None] | None = print,
    command: str = "cycle",
) -> CycleRun:
    """Run the cycle job (or `selection`) for each class of `cycle`, one run per partition, in this process.

    The cycle and `all_classes` (default `classes`) are registered as partitions
    first, so the runs show in the UI under their partition keys. Each run
    holds its partition's lock; when another run holds it, this waits
    (`wait_seconds` None: as long as it takes, saying so through `say`) or
    raises PartitionBusy naming that run.
    """
    register_partitions(instance, cycle, list(all_classes or classes))
    store = store_of(defs)
    store.begin(cycle, class_names(classes), command=command)
    mark_pending(store, cycle, [split_class_key(k) for k in classes], command=command)  # before any shard runs
    job = defs.resolve_job_def(CYCLE_JOB)
    run = CycleRun(cycle=cycle)
    # a class cut into shards that decides at class level runs in two phases (pipelines/phases.py)
    config, graph, i = defs.resources["planning"].config, defs.resolve_asset_graph(), 0
    batches = run_plan(config, classes)
    chosen_of = {p: phase_selection(graph, p, selection) for p in {r.phase for b in batches for r in b} | {TO_BACKTEST}}
    for number, batch in enumerate(batches):
        if number:
            done = {r.key: r.label not in run.results or run.results[r.label].success for r in batches[0] if r.phase}
            batch = second_runs(config, store, cycle, batch, done, chosen_of[TO_BACKTEST], say)
        for planned in batch:
            chosen = chosen_of[planned.phase]
            if chosen == []:  # a phase the selection holds nothing of (rebuild --from strategy_choice: no backtest)
                continue
            i, run_id = i + 1, str(uuid.uuid4())
            if on_start:
                on_start(i, planned.label, run_id)
            started = time.monotonic()
            with store.partition_lock(
                cycle, planned.key, run_id=run_id, command=command, wait_seconds=wait_seconds, say=say
            ), known_partitions(instance):
                result = job.execute_in_process(
                    run_config=run_config or {},
                    instance=instance,
                    partition_key=partition_key(cycle, planned.key),
                    asset_selection=chosen,
                    raise_on_error=False,
                    run_id=run_id,
                    tags=process_tags(),
                )
            run.results[planned.label] = result
            run.seconds[planned.label] = time.monotonic() - started
            if on_done:
                on_done(planned.label, result, run.seconds[planned.label])
    return run


def dagster_instance() -> dg.DagsterInstance:
    """The instance under DAGSTER_HOME (made when missing); exit 2 with what to do when it is not set."""
    home = os.environ.get("DAGSTER_HOME")
    if not home:
        print(
            "DAGSTER_HOME is not set, so the run would vanish with a temporary instance.\n"
            "Set it to a folder that will hold runs and check history, e.g.\n"
            "  export DAGSTER_HOME=$PWD/.dagster   (make demo does this)",
            file=sys.stderr,
        )
        raise SystemExit(2)
    Path(home).mkdir(parents=True, exist_ok=True)
    return dg.DagsterInstance.get()


def _run_in_child(
    config_path: str,
    cycle: str,
    product_class: str,
    first: str | None,
    run_id: str,
    run_config: dict,
    wait_seconds: float | None,
    command: str,
    phase: str | None = None,
) -> int:
    """One partition (or one `phase` of it) in a process of its own (`cycle --parallel`): 0 ran, 2 partition
    busy or bad input."""
    from pipelines.definitions import build_definitions

    defs = build_definitions(config_path)
    selection = phase_selection(defs.resolve_asset_graph(), phase, rebuild_selection(defs, first) if first else None)
    try:
        instance = dagster_instance()
        with store_of(defs).partition_lock(
            cycle, product_class, run_id=run_id, command=command, wait_seconds=wait_seconds, say=print
        ), known_partitions(instance):
            defs.resolve_job_def(CYCLE_JOB).execute_in_process(
                run_config=run_config,
                instance=instance,
                partition_key=partition_key(cycle, product_class),
                asset_selection=selection,
                raise_on_error=False,
                run_id=run_id,
                tags=process_tags(),
            )
    except PlanningError as err:
        print(f"error: {err}", flush=True)
        return 2
    return 0


def _child_main(*args) -> None:
    # the command's stdout is its own (the --json summary); what a child says is a diagnostic
    sys.stdout = sys.stderr
    from pipelines.instance_sqlite import fewer_flushes

    with fewer_flushes():  # as the command itself (pipelines/cycle_command.py)
        code = _run_in_child(*args)
    gc.freeze()  # as the command's own exit: its last collections skip what the run left (pipelines/__main__.py)
    raise SystemExit(code)


def run_partitions_parallel(
    config_path: str,
    instance: dg.DagsterInstance,
    cycle: str,
    classes: list[str],
    *,
    parallel: int,
    all_classes: list[str],
    first: str | None = None,
    run_config: dict | None = None,
    on_start: Callable[[int, str, str], None] | None = None,
    on_done: Callable[[PartitionOutcome], None] | None = None,
    wait_seconds: float | None = None,
    command: str = "cycle",
) -> list[PartitionOutcome]:
    """Run the classes of `cycle` `parallel` at a time, each in a process of its own (spawned: a fresh
    interpreter, so no Dagster or SQLite state is shared by fork); the outcomes read back from the instance."""
    from pipelines.definitions import build_definitions

    register_partitions(instance, cycle, list(all_classes))
    defs = build_definitions(config_path)
    store = store_of(defs)
    store.begin(cycle, class_names(classes), command=command)
    mark_pending(store, cycle, [split_class_key(k) for k in classes], command=command)  # before any shard runs
    # a class cut into shards that decides at class level runs in two phases (pipelines/phases.py)
    graph, wanted = defs.resolve_asset_graph(), rebuild_selection(defs, first) if first else None
    config, outcomes, count = defs.resources["planning"].config, [], 0
    batches = run_plan(config, classes)
    chosen_of = {p: phase_selection(graph, p, wanted) for p in {r.phase for b in batches for r in b} | {TO_BACKTEST}}
    for number, batch in enumerate(batches):
        if number:
            done = {o.product_class: o.success and o.exit_code == 0 for o in outcomes}
            done = {r.key: done.get(r.label, True) for r in batches[0] if r.phase}
            batch = second_runs(config, store, cycle, batch, done, chosen_of[TO_BACKTEST])
        runs = [r for r in batch if chosen_of[r.phase] != []]
        waiting = [(count + j, r) for j, r in enumerate(runs, 1)]
        count += len(runs)
        outcomes += _run_batch(config_path, instance, cycle, waiting, parallel, first, run_config, on_start, on_done,
                               wait_seconds, command)
    return outcomes


def _run_batch(
    config_path, instance, cycle, waiting: list[tuple[int, PlannedRun]], parallel, first, run_config, on_start,
    on_done, wait_seconds, command,
) -> list[PartitionOutcome]:
    """The runs of one batch, `parallel` at a time, each in a spawned process; their outcomes when all ended."""
    context = multiprocessing.get_context("spawn")
    running: dict[str, tuple] = {}
    outcomes = []
    while waiting or running:
        while waiting and len(running) < parallel:
            i, planned = waiting.pop(0)
            product_class, run_id = planned.label, str(uuid.uuid4())
            args = (config_path, cycle, planned.key, first, run_id, run_config or {}, wait_seconds, command,
                    planned.phase)
            process = context.Process(target=_child_main, args=args, name=f"apportion-{planned.key}")
            if on_start:
                on_start(i, product_class, run_id)
            process.start()
            running[product_class] = (process, run_id, time.monotonic())
        time.sleep(0.2)
        for product_class, (process, run_id, started) in list(running.items()):
            if process.is_alive():
                continue
            process.join()
            del running[product_class]
            outcome = PartitionOutcome.from_instance(product_class, instance, run_id, time.monotonic() - started)
            if process.exitcode == 2:
                outcome.failures.append(("start", "partition busy or bad input (message above)"))
            elif process.exitcode != 0:
                outcome.failures.append(("process", f"exited with code {process.exitcode}"))
                outcome.failure_kinds.append("crash")
            outcome.exit_code = process.exitcode
            outcomes.append(outcome)
            if on_done:
                on_done(outcome)
    return outcomes
