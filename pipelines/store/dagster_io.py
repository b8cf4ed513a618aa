"""The store seen from Dagster: the run's process tags, the proof of checks, dead runs marked failed.

The IO manager that writes and reads the store is
`pipelines.resources.PartitionStore` (it needs the planning config resource).

- `process_tags()`: host, pid and pid start of the process that executes a
  run, put on the run so a run whose process died can be told from one that
  is still working (pipelines.runner.mark_dead_runs_failed).
- `prove_checks`: for each table version a class is about to publish, whether
  its blocking checks passed in the run that wrote it (the event log of the
  instance), for the `publication` asset.
"""

from __future__ import annotations

import dagster as dg
import pandas as pd

from pipelines.store.files import this_process

TAG_PREFIX = "apportion/"
PARTITION_TAG = "dagster/partition"


def process_tags() -> dict[str, str]:
    """Tags naming the process that executes a run: apportion/host, apportion/pid, apportion/pid_start."""
    return {f"{TAG_PREFIX}{k}": v for k, v in this_process().items()}


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
