"""Runs that overlap: one writer per partition, stale locks of dead processes, partitions registered together,
and runs whose process died marked failed so the run queue moves on.

Each test starts real processes (the kernel's flock and SQLite's locking are
what is tested), kills them with SIGKILL where a crash is the point, and checks
the state the survivors see.
"""

import os
import signal
import subprocess
import sys
import time
import uuid
from pathlib import Path

import dagster as dg
import pytest
import yaml

from pipelines.store import PartitionBusy, open_store

ROOT = Path(__file__).resolve().parents[1]

HOLDER = """
import sys, time
from pipelines.store import open_store
with open_store(sys.argv[1]).partition_lock("2026-11-30", "spares", run_id=sys.argv[2], command="cycle"):
    print("holding", flush=True)
    time.sleep(float(sys.argv[3]))
print("released", flush=True)
"""


def _hold(store: Path, run_id: str, seconds: float) -> subprocess.Popen:
    child = subprocess.Popen(
        [sys.executable, "-c", HOLDER, str(store), run_id, str(seconds)], cwd=ROOT, stdout=subprocess.PIPE, text=True
    )
    assert child.stdout.readline().strip() == "holding"
    return child


def test_a_second_writer_on_a_partition_stops_naming_the_holder_or_waits_in_the_queue(tmp_path):
    store = tmp_path / "s"
    child = _hold(store, "run-one", 3)
    try:
        assert open_store(store).writer_of("2026-11-30", "spares")["run_id"] == "run-one"
        with pytest.raises(
            PartitionBusy, match=r"partition 2026-11-30\|spares is being written by run run-one \(cycle, pid \d+ on "
        ):
            with open_store(store).partition_lock("2026-11-30", "spares", run_id="run-two", wait_seconds=0):
                pass
        # another partition of the same cycle is free: writers of different classes never wait on each other
        with open_store(store).partition_lock("2026-11-30", "seasonal", run_id="run-three", wait_seconds=0):
            pass
        said = []
        started = time.monotonic()
        with open_store(store).partition_lock("2026-11-30", "spares", run_id="run-two", say=said.append) as held:
            waited = time.monotonic() - started
            assert held.owner["run_id"] == "run-two" and held.broke is None
    finally:
        child.wait(timeout=30)
    assert waited > 1.0 and child.stdout.read().strip() == "released"
    assert said and "being written by run run-one" in said[0] and "waiting in the queue" in said[0]
    assert open_store(store).writer_of("2026-11-30", "spares") is None


def test_the_cycle_command_exits_2_naming_the_run_that_holds_a_partition(tmp_path, monkeypatch, capsys):
    from pipelines.__main__ import main

    data = yaml.safe_load((ROOT / "config" / "planning.yaml").read_text())
    data["inputs"]["folder"] = str(ROOT / "data" / "demo")
    data["store"]["path"] = str(tmp_path / "s")
    config = tmp_path / "planning.yaml"
    config.write_text(yaml.safe_dump(data))
    monkeypatch.setenv("DAGSTER_HOME", str(tmp_path / "home"))
    child = _hold(tmp_path / "s", "run-one", 60)
    try:
        code = main(["cycle", "--config", str(config), "--class", "spares", "--if-busy", "stop"])
    finally:
        child.kill()
        child.wait()
    assert code == 2
    err = capsys.readouterr().err
    assert "partition 2026-11-30|spares is being written by run run-one (cycle, pid" in err and "--if-busy wait" in err


def test_the_stale_lock_of_a_killed_writer_is_broken_with_a_message(tmp_path):
    store = tmp_path / "s"
    child = _hold(store, "run-killed", 60)
    os.kill(child.pid, signal.SIGKILL)
    child.wait()
    said = []
    with open_store(store).partition_lock(
        "2026-11-30", "spares", run_id="run-next", wait_seconds=0, say=said.append
    ) as held:
        assert held.broke["run_id"] == "run-killed"
    assert len(said) == 1
    assert said[0].startswith("partition 2026-11-30|spares: broke the stale lock of run run-killed (cycle, pid ")
    assert said[0].endswith("whose process is no longer running")
    # released cleanly this time: the next writer breaks nothing
    with open_store(store).partition_lock(
        "2026-11-30", "spares", run_id="run-after", wait_seconds=0, say=said.append
    ) as held:
        assert held.broke is None
    assert len(said) == 1


REGISTER = """
import sys, time
import dagster as dg
from pipelines.partitions import register_partitions
instance = dg.DagsterInstance.get()
start = float(sys.argv[1])
while time.time() < start:
    time.sleep(0.001)
for i in range(int(sys.argv[2])):
    register_partitions(instance, f"2026-01-{i:02d}", ["consumables", "seasonal", "spares", f"extra{i}"])
print("registered", flush=True)
"""


def _home(tmp_path: Path) -> dict:
    home = tmp_path / "home"
    home.mkdir(exist_ok=True)
    (home / "dagster.yaml").write_text("telemetry:\n  enabled: false\n")
    return {**os.environ, "DAGSTER_HOME": str(home)}


def test_partitions_registered_by_two_processes_at_once(tmp_path):
    env = _home(tmp_path)
    dg.DagsterInstance.local_temp(tempdir=env["DAGSTER_HOME"]).get_dynamic_partitions("cycle")  # storage made once
    start = time.time() + 8  # both have imported dagster by then; then they race key by key
    children = [
        subprocess.Popen(
            [sys.executable, "-c", REGISTER, str(start), "10"],
            cwd=ROOT,
            env=env,
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            text=True,
        )
        for _ in range(2)
    ]
    outs = [c.communicate(timeout=300) for c in children]
    for child, (out, err) in zip(children, outs, strict=False):
        assert child.returncode == 0, err[-2000:]
        assert out.strip() == "registered"
    instance = dg.DagsterInstance.local_temp(tempdir=env["DAGSTER_HOME"])
    assert sorted(instance.get_dynamic_partitions("cycle")) == [f"2026-01-{i:02d}" for i in range(10)]
    classes = instance.get_dynamic_partitions("product_class")
    assert len(classes) == len(set(classes)) == 13


SLEEPER = """
import sys, time
import dagster as dg
from pipelines.store.dagster_io import process_tags

@dg.op
def wait_a_while():
    print("running", flush=True)
    time.sleep(120)

@dg.job
def sleeper():
    wait_a_while()

sleeper.execute_in_process(instance=dg.DagsterInstance.get(), run_id=sys.argv[1], tags=process_tags())
"""


def test_a_started_run_whose_process_died_is_marked_failed(tmp_path):
    from pipelines.store.dagster_io import mark_dead_runs_failed

    env = _home(tmp_path)
    run_id = str(uuid.uuid4())
    child = subprocess.Popen(
        [sys.executable, "-c", SLEEPER, run_id], cwd=ROOT, env=env, stdout=subprocess.PIPE, text=True
    )
    instance = dg.DagsterInstance.local_temp(tempdir=env["DAGSTER_HOME"])
    try:
        assert child.stdout.readline().strip() == "running"
        assert instance.get_run_by_id(run_id).status == dg.DagsterRunStatus.STARTED
        assert mark_dead_runs_failed(instance) == []  # alive: left alone
        os.kill(child.pid, signal.SIGKILL)
        child.wait()
    finally:
        if child.poll() is None:
            child.kill()
    assert instance.get_run_by_id(run_id).status == dg.DagsterRunStatus.STARTED  # nothing else would ever change it
    marked = mark_dead_runs_failed(instance)
    assert (
        len(marked) == 1
        and run_id in marked[0]
        and f"pid {child.pid}" in marked[0]
        and "no longer running" in marked[0]
    )
    run = instance.get_run_by_id(run_id)
    assert run.status == dg.DagsterRunStatus.FAILURE
    assert mark_dead_runs_failed(instance) == []
