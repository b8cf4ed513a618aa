"""Publication of a class cut into shards on a rerun of the cycle: never complete with old and new shards mixed
(pipelines/store/pending.py, assets/publication.py `is_complete`).

The rule under test (DEVELOPERS.md, *Shards*, "Publication"): a class is recorded complete only when every shard's
proven versions belong to the same run of the cycle. Common practice, no source: the "pending marker" pattern of a
two-phase commit, each participant cleared by its own commit under one lock.
"""

from pathlib import Path

import dagster as dg
import pytest
from stage_runs import sharded_demo_file

from pipelines.store import open_store
from pipelines.store.pending import PENDING, PROVEN, mark_pending, settle_shard, shard_mark

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "data" / "demo"
CYCLE = "2026-11-30"
SHARDS = ["spares~1of2", "spares~2of2"]
EVERY = ["consumables", "seasonal", *SHARDS]


def test_the_last_shard_to_settle_sees_no_other_pending(tmp_path):
    store = open_store(tmp_path / "store")
    mark_pending(store, CYCLE, [("spares", "1of3"), ("spares", "2of3"), ("spares", "3of3"), ("consumables", "0")],
                 command="cycle")
    assert shard_mark(store, CYCLE, "consumables", "0") is None  # a class not cut has no shard to wait for
    assert settle_shard(store, CYCLE, "spares", "2of3", "run-b", ["1of3", "3of3"]) == ["1of3", "3of3"]
    assert shard_mark(store, CYCLE, "spares", "2of3") == {**shard_mark(store, CYCLE, "spares", "2of3"),
                                                          "state": PROVEN, "run_id": "run-b"}
    assert settle_shard(store, CYCLE, "spares", "1of3", "run-a", ["2of3", "3of3"]) == ["3of3"]
    assert shard_mark(store, CYCLE, "spares", "3of3")["state"] == PENDING
    # shard 3 last: nothing pending. But a run of shard 1 queued since (from the UI) is waited for, while the
    # still-running run that proved shard 2 is not
    runs = {"1of3": ["run-queued"], "2of3": ["run-b"]}
    assert settle_shard(store, CYCLE, "spares", "3of3", "run-c", ["1of3", "2of3"], lambda s: runs.get(s, [])) == [
        "1of3"]
    assert settle_shard(store, CYCLE, "spares", "3of3", "run-c", ["1of3", "2of3"]) == []


def _config(tmp: Path) -> str:
    return sharded_demo_file(tmp)


@pytest.mark.graph
def test_a_rerun_records_the_class_complete_only_once_every_shard_ran_again(tmp_path):
    from pipelines.definitions import build_definitions
    from pipelines.jobs import CYCLE_JOB
    from pipelines.partitions import partition_key
    from pipelines.runner import run_partitions
    from pipelines.store.dagster_io import PARTITION_TAG

    defs, instance = build_definitions(_config(tmp_path)), dg.DagsterInstance.ephemeral()
    store = open_store(tmp_path / "store")
    first = run_partitions(defs, instance, CYCLE, SHARDS, all_classes=EVERY, say=None)
    assert first.success and store.class_record(CYCLE, "spares")["state"] == "complete"

    # the rerun of the cycle's class: the command line marks both shards, then runs them one after the other
    seen = []
    again = run_partitions(defs, instance, CYCLE, SHARDS, all_classes=EVERY, say=None,
                           on_done=lambda key, result, s: seen.append(store.class_record(CYCLE, "spares")["state"]))
    # after shard 1 the class waits for shard 2 (before the fix: complete with shard 2's versions of the first run)
    assert again.success and seen == ["pending", "complete"]
    record = store.class_record(CYCLE, "spares")["tables"]["statistical_forecast"]
    assert {record[s]["run_id"] for s in ("1of2", "2of2")} == {r.run_id for r in again.results.values()}

    # a run of shard 2 launched from the UI, not started yet: shard 1 run alone does not complete the class. (A
    # QUEUED run record needs a code location's origin to be made; NOT_STARTED, the state before the queue takes
    # it, is asked for by the same filter, pipelines.publication.ACTIVE.)
    queued = instance.add_run(dg.DagsterRun(job_name=CYCLE_JOB, status=dg.DagsterRunStatus.NOT_STARTED,
                                            tags={PARTITION_TAG: str(partition_key(CYCLE, "spares~2of2"))}))
    alone = run_partitions(defs, instance, CYCLE, ["spares~1of2"], all_classes=EVERY, say=None)
    assert alone.success and store.class_record(CYCLE, "spares")["state"] == "pending"
    instance.report_run_canceled(queued)  # the queued run cancelled: shard 1's rerun alone completes the class
    last = run_partitions(defs, instance, CYCLE, ["spares~1of2"], all_classes=EVERY, say=None)
    assert last.success and store.class_record(CYCLE, "spares")["state"] == "complete"
