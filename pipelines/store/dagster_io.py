"""The store seen from Dagster: the IO manager, the run's process tags, and the proof of checks.

- `PartitionStore` writes every asset output as a new version of its
  partition and loads inputs from the latest versions. For the whole run it
  holds the partition's one-writer lock (taken when the run's resources are
  set up, released when they are torn down; the kernel releases it when the
  run's process dies), and it marks the class pending: a run rewriting it means
  the class's last complete versions no longer count towards a publication.
- `process_tags()`: host, pid and pid start of the process that executes a
  run, put on the run so a run whose process died can be told from one that
  is still working (pipelines.runner.mark_dead_runs_failed).
- `prove_checks`: for each table version a class is about to publish, whether
  its blocking checks passed in the run that wrote it (the event log of the
  instance), for the `publication` asset.
"""

from __future__ import annotations

from typing import Any

import dagster as dg
import pandas as pd
import pyarrow as pa
from pydantic import PrivateAttr

from pipelines.partitions import split_key
from pipelines.resources import PlanningConfigResource
from pipelines.store import PartitionBusy, open_store, partition_stored, read_table
from pipelines.store.files import this_process

TAG_PREFIX = "apportion/"
PARTITION_TAG = "dagster/partition"


def process_tags() -> dict[str, str]:
    """Tags naming the process that executes a run: apportion/host, apportion/pid, apportion/pid_start."""
    return {f"{TAG_PREFIX}{k}": v for k, v in this_process().items()}


class PartitionStore(dg.ConfigurableIOManager):
    """Each output a new version of its partition in the store folder `store.path`; inputs the latest versions.

    A partition's table holds the frame as the asset produced it, with the
    columns `partition_cycle` and `partition_class` in front; reading a
    partition returns the frame without them. See pipelines/store/store.py for
    the layout and the publication protocol.
    """

    planning: PlanningConfigResource
    _lock: Any = PrivateAttr(default=None)

    @property
    def path(self):
        return self.planning.config.store.path

    @property
    def store(self):
        return open_store(self.path)

    def setup_for_execution(self, context: dg.InitResourceContext) -> None:
        run = context.run
        key = run.tags.get(PARTITION_TAG) if run is not None else None
        if not key:
            return
        mine = process_tags()
        if context.instance is not None and any(run.tags.get(k) != v for k, v in mine.items()):
            context.instance.add_run_tags(run.run_id, mine)
        cycle, product_class = split_key(key)
        wait = self.planning.config.store.lock_wait_minutes * 60
        log = context.log

        def say(message: str) -> None:
            if log is not None:
                log.warning(message)

        lock = self.store.partition_lock(
            cycle, product_class, run_id=run.run_id, command=f"run of {run.job_name}", wait_seconds=wait, say=say
        )
        try:
            lock.__enter__()
        except PartitionBusy as busy:
            raise PartitionBusy(
                f"{busy}; this run stops (store.lock_wait_minutes is {wait / 60:g})", busy.holder
            ) from None
        self._lock = lock
        record = self.store.class_record(cycle, product_class) or {}
        if record.get("state") != "pending" or record.get("run_id") != run.run_id:
            self.store.begin(cycle, [product_class], command=f"run of {run.job_name}", run_id=run.run_id)

    def teardown_after_execution(self, context: dg.InitResourceContext) -> None:
        if self._lock is not None:
            lock, self._lock = self._lock, None
            lock.__exit__(None, None, None)

    def handle_output(self, context: dg.OutputContext, obj) -> None:
        table = context.asset_key.path[-1]
        cycle, product_class = split_key(context.asset_partition_key)
        pointer = self.store.write(table, cycle, product_class, obj, run_id=context.run_id)
        folder = self.store.partition_dir(table, cycle, product_class, pointer["shard"])
        context.add_output_metadata(
            {
                "store_file": dg.MetadataValue.path(str(folder / pointer["file"])),
                "store_query": dg.MetadataValue.text(
                    f"SELECT * FROM {table} WHERE partition_cycle = '{cycle}' AND partition_class = '{product_class}'"
                    f"  -- in {self.store.views_path} once the cycle is published"
                ),
            }
        )

    def load_input(self, context: dg.InputContext) -> pd.DataFrame:
        table = context.upstream_output.asset_key.path[-1]
        cycle, product_class = split_key(context.asset_partition_key)
        if not partition_stored(self.path, table, cycle, product_class):
            raise FileNotFoundError(
                f"partition {cycle}|{product_class} of {table!r} is not in the store {self.path}; materialize {table} "
                f"for that partition first (python -m pipelines cycle --cycle {cycle} --class {product_class})"
            )
        # an input annotated as a pyarrow Table gets one (columnar stages), any other a pandas frame
        wants_arrow = getattr(context.dagster_type, "typing_type", None) is pa.Table
        return read_table(
            self.path, table, cycle=cycle, product_class=product_class, versions="latest", as_arrow=wants_arrow
        )


def prove_checks(
    instance: dg.DagsterInstance,
    this_run: str,
    versions: pd.DataFrame,
    blocking: dict[str, list[str]],
    trusted: set[tuple[str, str, str]],
) -> pd.DataFrame:
    """`versions` (asset, shard, file, run_id, ...) with `proven` and `proof` added.

    A version written by this run passed its blocking checks, or this run
    would not have reached the publication step (it is downstream of every
    asset). Another run's version (a rebuild reuses stored upstream tables) is
    proven by that run's check evaluations in the instance: every blocking
    check of its asset passed there. A version already in the class's last
    complete record or the cycle's publication (`trusted`: asset, shard, file)
    was proven when it got there.
    """
    evaluations: dict[str, dict[tuple[str, str], bool] | None] = {}

    def of_run(run_id: str) -> dict[tuple[str, str], bool] | None:
        if run_id not in evaluations:
            if not run_id or instance.get_run_by_id(run_id) is None:
                evaluations[run_id] = None
            else:
                found = {}
                for entry in instance.all_logs(run_id, of_type=dg.DagsterEventType.ASSET_CHECK_EVALUATION):
                    e = entry.dagster_event.event_specific_data
                    found[(e.asset_key.to_user_string(), e.check_name)] = bool(e.passed)
                evaluations[run_id] = found
        return evaluations[run_id]

    proven, proof = [], []
    for r in versions.itertuples(index=False):  # one row per table of the class: a few dozen
        if not isinstance(r.file, str) or not r.file:
            proven.append(False)
            proof.append(f"never written for this partition: materialize {r.asset} (rebuild from it)")
            continue
        if r.run_id == this_run:
            proven.append(True)
            proof.append("written and checked in this run")
            continue
        is_trusted = (r.asset, r.shard, r.file) in trusted
        found = of_run(r.run_id)
        if found is None:
            proven.append(is_trusted)
            proof.append(
                "proven when the class last completed"
                if is_trusted
                else f"written by run {r.run_id or '(none)'}, which this Dagster instance does not know; "
                f"rebuild from {r.asset}"
            )
            continue
        failed = [c for c in blocking.get(r.asset, []) if found.get((r.asset, c)) is False]
        missing = [c for c in blocking.get(r.asset, []) if (r.asset, c) not in found]
        if failed:
            proven.append(False)
            proof.append(
                f"check {', '.join(failed)} failed in run {r.run_id}, which wrote it; fix the input and "
                f"rebuild from {r.asset}"
            )
        elif missing and not is_trusted:
            proven.append(False)
            proof.append(
                f"run {r.run_id} wrote it but never evaluated {', '.join(missing)} (stopped or killed); "
                f"rebuild from {r.asset}"
            )
        else:
            proven.append(True)
            proof.append(f"checks passed in run {r.run_id}")
    return versions.assign(proven=proven, proof=proof)


def _worker_pid_from_events(instance: dg.DagsterInstance, run_id: str) -> str | None:
    """The pid a run worker reported ("Started process for run (pid: N)"), from the run's engine events."""
    for entry in instance.all_logs(run_id, of_type=dg.DagsterEventType.ENGINE_EVENT):
        message = entry.dagster_event.message or ""
        if message.startswith("Started process for run (pid: "):
            return message.split("(pid: ", 1)[1].split(")", 1)[0]
    return None


def _local_instance(instance: dg.DagsterInstance) -> bool:
    return "sqlite" in type(instance.run_storage).__name__.lower()


def mark_dead_runs_failed(instance: dg.DagsterInstance) -> list[str]:
    """Mark failed every STARTED run whose process is no longer running on this host; a message per run.

    The process is the one named by the run's apportion/host, apportion/pid and
    apportion/pid_start tags (put there by the command line and by the IO
    manager inside the run worker); for a run that died before those were
    written, on a local (SQLite) instance, the pid its run worker reported.
    Runs on another host are left to Dagster's run monitoring (a launcher that
    checks its workers' health, e.g. on Kubernetes). A run killed with
    `kill -9` would otherwise stay STARTED for ever and hold a place in the
    run queue, so the daemon would launch nothing more.
    """
    from pipelines.store.files import HOST, process_alive

    messages = []
    for record in instance.get_run_records(filters=dg.RunsFilter(statuses=[dg.DagsterRunStatus.STARTED])):
        run = record.dagster_run
        host, pid, start = (run.tags.get(f"{TAG_PREFIX}{k}") for k in ("host", "pid", "pid_start"))
        if not pid and _local_instance(instance):
            host, pid, start = HOST, _worker_pid_from_events(instance, run.run_id), None
        if not host or not pid or process_alive(host, pid, start) is not False:
            continue
        what = run.tags.get(PARTITION_TAG) or run.job_name
        message = (
            f"run {run.run_id} ({what}) was executed by pid {pid} on {host}, which is no longer running "
            f"(killed?); marked failed so the run queue moves on"
        )
        instance.report_run_failed(run, message)
        messages.append(message)
    return messages
