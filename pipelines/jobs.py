"""The cycle job, its schedule, and the sensor that starts a cycle when new history lands.

A run of `planning_cycle` is one partition: one product class in one cycle (a
week or a month, per `calendar.period`). The
schedule and the sensor register the cycle date and the configured classes as
partitions, then request one run per class. A class cut into shards that
decides at class level (`pipelines.phases`) is requested in two phases: the
schedule and the new-history sensor request each shard's run up to the
backtest (tagged `apportion/phase`), and the sensor `class_step` requests
every shard's run from `strategy_choice` on once all of them succeeded.
"""

import hashlib
import json

import dagster as dg

from pipelines.engines.inputs import find_files, sha256
from pipelines.errors import PlanningError
from pipelines.partitions import current_cycle, partition_key, register_partitions
from pipelines.phases import FROM_CHOICE, TO_BACKTEST, PlannedRun, phase_selection, run_plan
from pipelines.resources import PlanningConfigResource
from pipelines.shards import needs_class_step, partition_classes, split_class_key
from pipelines.store import open_store
from pipelines.store.dagster_io import mark_dead_runs_failed
from pipelines.store.pending import mark_pending

CYCLE_JOB = "planning_cycle"
# the schedule's name says what it starts, not when: its cron is its setting (cron_schedule below)
CYCLE_SCHEDULE = "planning_cycle_schedule"
NEW_HISTORY_SENSOR = "new_history_file"
DEAD_RUN_REAPER = "dead_run_reaper"
CLASS_STEP_SENSOR = "class_step"
PHASE_TAG = "apportion/phase"  # a run of one phase requested by the schedule or a sensor (the command line's: none)
AFTER_TAG = "apportion/after"  # a second phase's run: which first-phase runs it follows (a digest of their ids)

cycle_job = dg.define_asset_job(
    CYCLE_JOB,
    selection=dg.AssetSelection.all(),
    description="The whole cycle for one product class (a partition cycle|class): history in, shares "
    "refreshed, forecast rerun and split, reconciliation proven.",
)


def start_cycle(instance: dg.DagsterInstance, config, cycle: str, classes: list[str], by: str) -> None:
    """Register the partitions and mark the classes pending in the store, before their runs are requested.

    Pending: until every one of them completes again, the cycle's publication
    stays as it was, so a rerun in which one class fails does not publish the
    others' new tables beside that class's old ones.
    """
    register_partitions(instance, cycle, classes)
    names = list(dict.fromkeys(split_class_key(k)[0] for k in classes))  # the classes of the keys, once each
    store = open_store(config.store.path)
    store.begin(cycle, names, command=by)
    mark_pending(store, cycle, [split_class_key(k) for k in classes], command=by)  # each shard: its run is new


def cycle_run_requests(
    cycle: str, classes: list[str], run_key_prefix: str, config=None, graph=None
) -> list[dg.RunRequest]:
    """One run request per class of `cycle`; the run key makes a repeated tick a no-op. With `config` and the
    asset `graph`, a shard of a class deciding at class level is requested up to the backtest only (its second
    phase: `class_step_sensor`)."""
    plan = run_plan(config, classes)[0] if config is not None else [PlannedRun(c) for c in classes]
    # each phase's assets resolved once, not once per shard
    selections = {phase: phase_selection(graph, phase, None) for phase in {r.phase for r in plan} if phase}
    return [_request(cycle, r, f"{run_key_prefix}:{cycle}|{r.key}", selections.get(r.phase)) for r in plan]


def _graph(context):
    """The asset graph of the code location a tick runs in (None outside one: no phase can be selected)."""
    return context.repository_def.asset_graph if context.repository_def is not None else None


def _request(cycle: str, planned: PlannedRun, run_key: str, selection, tags: dict | None = None) -> dg.RunRequest:
    phase = {PHASE_TAG: planned.phase} if planned.phase else {}
    return dg.RunRequest(
        run_key=run_key,
        partition_key=partition_key(cycle, planned.key),
        tags={"cycle": cycle, "product_class": planned.key, **phase, **(tags or {})},
        asset_selection=selection,  # a phase's assets (None: the whole graph)
    )


def cycle_schedule_for(cron: str, period: str = "week") -> dg.ScheduleDefinition:
    """The schedule that starts the current cycle at `cron` (UTC): `calendar.schedule`, by default the first day
    of each period at 06:00 (Monday for weeks, the first of the month for months)."""

    @dg.schedule(
        name=CYCLE_SCHEDULE,
        job=cycle_job,
        cron_schedule=cron,
        execution_timezone="UTC",
        default_status=dg.DefaultScheduleStatus.STOPPED,
        description=f"At cron {cron!r} (UTC; calendar.schedule, {period}ly calendar): the current cycle "
        "(calendar.cycle_date, by default the period after the latest history) for every configured class, one run "
        "each. Stopped until the platform team starts it.",
    )
    def cycle_schedule(context: dg.ScheduleEvaluationContext, planning: PlanningConfigResource):
        try:
            config = planning.config
            cycle = current_cycle(config)
        except PlanningError as err:
            return dg.SkipReason(f"no cycle started: {err}")
        classes = partition_classes(config)  # a class cut into shards: one key per shard
        start_cycle(context.instance, config, cycle, classes, by=f"schedule {CYCLE_SCHEDULE}")
        return cycle_run_requests(
            cycle, classes, run_key_prefix=f"schedule:{context.scheduled_execution_time:%Y-%m-%dT%H:%M}",
            config=config, graph=_graph(context),
        )

    return cycle_schedule


def history_signature(folder) -> dict[str, str]:
    """file name -> sha256 of every history file of the input folder."""
    return {p.name: sha256(p) for p in find_files(folder, "history", many=True, required=False)}


@dg.sensor(
    name=NEW_HISTORY_SENSOR,
    job=cycle_job,
    minimum_interval_seconds=60,
    default_status=dg.DefaultSensorStatus.STOPPED,
    description="Starts the current cycle for every class when a history file in inputs.folder is new or changed "
    "(compared by content hash). Stopped until started; the first tick records the files it finds and starts a cycle.",
)
def new_history_file_sensor(context: dg.SensorEvaluationContext, planning: PlanningConfigResource):
    try:
        config = planning.config
        if config.inputs.history is not None:
            return dg.SkipReason(
                f"inputs.history reads the history from {config.inputs.history.describe()}; this sensor watches "
                f"history files only: start the schedule {CYCLE_SCHEDULE} instead"
            )
        signature = history_signature(config.inputs.folder)
    except PlanningError as err:
        return dg.SkipReason(f"cannot read the input folder: {err}")
    seen = json.loads(context.cursor) if context.cursor else {}
    changed = sorted(name for name, digest in signature.items() if seen.get(name) != digest)
    if not changed:
        return dg.SkipReason(f"no new or changed history file in {config.inputs.folder}")
    try:
        cycle = current_cycle(config)
    except PlanningError as err:
        return dg.SkipReason(f"history changed ({', '.join(changed)}) but no cycle can start: {err}")
    classes = partition_classes(config)  # a class cut into shards: one key per shard
    start_cycle(context.instance, config, cycle, classes, by=f"sensor {NEW_HISTORY_SENSOR}")
    digest = sha256_of_signature(signature)
    return dg.SensorResult(
        run_requests=cycle_run_requests(
            cycle, classes, run_key_prefix=f"history:{digest}", config=config, graph=_graph(context)
        ),
        cursor=json.dumps(signature, sort_keys=True),
    )


def sha256_of_signature(signature: dict[str, str]) -> str:
    return hashlib.sha256(json.dumps(signature, sort_keys=True).encode()).hexdigest()[:16]


@dg.sensor(
    name=DEAD_RUN_REAPER,
    minimum_interval_seconds=60,
    default_status=dg.DefaultSensorStatus.RUNNING,
    description="Every minute, marks failed each started run whose process on this machine is no longer running "
    "(killed, out of memory, machine restarted), so it stops holding a place in the run queue and the schedule and "
    "sensor keep launching. Runs on other machines are left to Dagster's run monitoring.",
)
def dead_run_reaper(context: dg.SensorEvaluationContext):
    marked = mark_dead_runs_failed(context.instance)
    for message in marked:
        context.log.warning(message)
    return dg.SkipReason("; ".join(marked) if marked else "no run with a dead process")


@dg.sensor(
    name=CLASS_STEP_SENSOR,
    job=cycle_job,
    minimum_interval_seconds=30,
    default_status=dg.DefaultSensorStatus.RUNNING,
    description="For a class cut into shards that decides at class level (strategy or seasonality auto): when the "
    "schedule's or the new-history sensor's runs of all its shards up to the backtest have succeeded, requests "
    "every shard's run from strategy_choice on (which reads every shard's backtest). Does nothing for other "
    "classes or for the command line's runs, which run both phases themselves.",
)
def class_step_sensor(context: dg.SensorEvaluationContext, planning: PlanningConfigResource):
    try:
        config = planning.config
    except PlanningError as err:
        return dg.SkipReason(f"cannot read the config: {err}")
    phased = [name for name in config.product_classes if needs_class_step(config, name)]
    if not phased:
        return dg.SkipReason("no class is cut into shards and decides at class level")
    firsts = context.instance.get_runs(filters=dg.RunsFilter(tags={PHASE_TAG: TO_BACKTEST}), limit=1000)
    newest: dict[tuple[str, str], dg.DagsterRun] = {}
    for run in firsts:  # newest first
        newest.setdefault((run.tags.get("cycle", ""), run.tags.get("product_class", "")), run)
    requests, notes, second = [], [], None  # the second phase's assets, resolved once when first needed
    for cycle in sorted({c for c, _ in newest}, reverse=True):
        for name in phased:
            ready, note = _second_phase(context.instance, config, cycle, name, newest)
            notes += [note] if note else []
            if ready and second is None:
                second = phase_selection(_graph(context), FROM_CHOICE, None)
            requests += [_request(cycle, PlannedRun(k, FROM_CHOICE), f"{CLASS_STEP_SENSOR}:{cycle}|{k}|{ready}",
                                  second, {AFTER_TAG: ready}) for k in
                         (partition_classes(config, [name]) if ready else [])]
    return requests or dg.SkipReason("; ".join(notes) or "no shard's run up to the backtest was requested")


def _second_phase(instance, config, cycle: str, name: str, newest) -> tuple[str, str]:
    """(digest of the first-phase runs, '') when class `name`'s second phase of `cycle` is due; else ('', why not:
    '' when its first phase was not requested in phases, or its second already was)."""
    keys = partition_classes(config, [name])
    runs = {k: newest.get((cycle, k)) for k in keys}
    if all(r is None for r in runs.values()):
        return "", ""
    missing = [k for k, r in runs.items() if r is None]
    failed = [k for k, r in runs.items() if r is not None and r.status in (
        dg.DagsterRunStatus.FAILURE, dg.DagsterRunStatus.CANCELED)]
    waiting = [k for k, r in runs.items() if r is not None and r.status != dg.DagsterRunStatus.SUCCESS]
    if failed:
        return "", (f"{cycle} {name}: the run up to the backtest of {failed} did not succeed, so no shard goes on "
                    f"to strategy_choice; fix it and run: python -m pipelines cycle --cycle {cycle} --class {name}")
    if missing or waiting:
        return "", f"{cycle} {name}: waiting for the backtest of {missing + waiting}"
    digest = hashlib.sha256("|".join(sorted(r.run_id for r in runs.values())).encode()).hexdigest()[:16]
    if instance.get_runs(filters=dg.RunsFilter(tags={AFTER_TAG: digest}), limit=1):
        return "", ""
    return digest, ""
