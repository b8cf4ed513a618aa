"""Cycle x class partitions: narrowing the config, finding the current cycle, the schedule and the sensor."""

import datetime as dt
from pathlib import Path

import dagster as dg
import pytest
import yaml

from pipelines.definitions import build_definitions
from pipelines.errors import ConfigError
from pipelines.jobs import CYCLE_JOB, CYCLE_SCHEDULE, PHASE_TAG, class_step_sensor, new_history_file_sensor
from pipelines.partitions import CYCLE, PRODUCT_CLASS, current_cycle, narrow_config, partition_key, split_key
from pipelines.phases import FROM_CHOICE, TO_BACKTEST, phase_selection
from pipelines.resources import PlanningConfigResource

ROOT = Path(__file__).resolve().parents[1]


def _history(folder: Path, rows: list[str]) -> None:
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "history.csv").write_text(
        "product,site,customer,period_start,quantity\n" + "".join(r + "\n" for r in rows)
    )


def _config_file(tmp_path: Path, folder: Path, **calendar) -> str:
    data = {
        "inputs": {"folder": str(folder)},
        "store": {"path": str(tmp_path / "store")},
        "calendar": {"period": "week", **calendar},
        "product_classes": {"fast": {"window": 4}, "slow": {"window": 8}},
    }
    path = tmp_path / "planning.yaml"
    path.write_text(yaml.safe_dump(data))
    return str(path)


def test_partition_keys_round_trip_and_bad_keys_are_named():
    key = partition_key("2026-11-30", "seasonal")
    assert str(key) == "2026-11-30|seasonal"  # Dagster orders dimensions by name: cycle, product_class
    assert split_key(key) == split_key("2026-11-30|seasonal") == ("2026-11-30", "seasonal")
    with pytest.raises(ConfigError, match="CYCLE\\|PRODUCT_CLASS"):
        split_key("2026-11-30")


def test_narrowed_config_keeps_one_class_and_the_cycle_date(make_config):
    base = make_config({"fast": {"window": 4}, "slow": {"window": 8}})
    narrow = narrow_config(base, "2026-11-30", "slow")
    assert list(narrow.product_classes) == ["slow"] and narrow.product_classes["slow"].window == 8
    assert narrow.calendar.cycle_date == dt.date(2026, 11, 30)
    assert narrow.source == base.source and list(base.product_classes) == ["fast", "slow"]  # the original is untouched
    with pytest.raises(ConfigError, match="'bulky' is not under product_classes.*'fast', 'slow'"):
        narrow_config(base, "2026-11-30", "bulky")
    with pytest.raises(ConfigError, match="does not start a week"):
        narrow_config(base, "2026-12-01", "fast")  # a Tuesday


def test_current_cycle_is_the_period_after_the_latest_history(tmp_path):
    folder = tmp_path / "in"
    # latest line on Wednesday 2026-11-25: its week starts Monday 11-23, so the cycle is Monday 11-30
    _history(folder, ["P,S,C,2026-11-16,1", "P,S,C,2026-11-25,2", "P,S,C,not a date,3"])
    config = PlanningConfigResource(path=_config_file(tmp_path, folder)).config
    assert current_cycle(config) == "2026-11-30"
    assert current_cycle(config, "2026-11-23") == "2026-11-23"
    with pytest.raises(ConfigError, match="does not start a week"):
        current_cycle(config, "2026-11-24")
    fixed = PlanningConfigResource(path=_config_file(tmp_path, folder, cycle_date="2026-11-16")).config
    assert current_cycle(fixed) == "2026-11-16"
    _history(folder, ["P,S,C,,1"])
    with pytest.raises(ConfigError, match="no history file .* has a dated line"):
        current_cycle(config)


def test_schedule_registers_the_cycle_and_requests_one_run_per_class(tmp_path):
    folder = tmp_path / "in"
    _history(folder, ["P,S,C,2026-11-23,1"])
    planning = PlanningConfigResource(path=_config_file(tmp_path, folder))
    with dg.instance_for_test() as instance:
        schedule = build_definitions(planning.path).resolve_schedule_def(CYCLE_SCHEDULE)
        # the context as a context manager: its resources and instance are released (Dagster keeps the
        # instance's state storage in a context variable until then, which later tests would find dead)
        with dg.build_schedule_context(
            instance=instance,
            scheduled_execution_time=dt.datetime(2026, 11, 30, 6, tzinfo=dt.timezone.utc),
            resources={"planning": planning},
            repository_def=build_definitions(planning.path).get_repository_def(),
        ) as context:
            requests = schedule.evaluate_tick(context).run_requests
        assert [r.partition_key for r in requests] == ["2026-11-30|fast", "2026-11-30|slow"]
        assert instance.get_dynamic_partitions(CYCLE) == ["2026-11-30"]
        assert instance.get_dynamic_partitions(PRODUCT_CLASS) == ["fast", "slow"]


def test_the_schedule_follows_the_calendar_and_its_cron_is_configurable(tmp_path):
    folder = tmp_path / "in"
    _history(folder, ["P,S,C,2026-10-14,1"])

    def schedule(**calendar) -> dg.ScheduleDefinition:
        return build_definitions(_config_file(tmp_path, folder, **calendar)).resolve_schedule_def(CYCLE_SCHEDULE)

    weekly, monthly = schedule(period="week"), schedule(period="month")
    assert (weekly.cron_schedule, weekly.execution_timezone) == ("0 6 * * 1", "UTC")  # Monday 06:00 UTC
    assert (monthly.cron_schedule, monthly.execution_timezone) == ("0 6 1 * *", "UTC")  # the 1st, 06:00 UTC
    assert schedule(period="month", schedule="0 4 2 * *").cron_schedule == "0 4 2 * *"
    # a monthly tick on the first of November starts the month after the latest history (October): November
    planning = PlanningConfigResource(path=_config_file(tmp_path, folder, period="month"))
    with dg.instance_for_test() as instance:
        with dg.build_schedule_context(
            instance=instance,
            scheduled_execution_time=dt.datetime(2026, 11, 1, 6, tzinfo=dt.timezone.utc),
            resources={"planning": planning},
            repository_def=build_definitions(planning.path).get_repository_def(),
        ) as context:
            requests = monthly.evaluate_tick(context).run_requests
        assert [r.partition_key for r in requests] == ["2026-11-01|fast", "2026-11-01|slow"]


def test_sensor_starts_a_cycle_when_a_history_file_is_new_or_changed(tmp_path):
    folder = tmp_path / "in"
    _history(folder, ["P,S,C,2026-11-16,1"])
    planning = PlanningConfigResource(path=_config_file(tmp_path, folder))
    defs = build_definitions(planning.path)
    # the daemon evaluates a tick with the instance as the partition store; so does this test
    with dg.instance_for_test() as instance, dg.partition_loading_context(dynamic_partitions_store=instance):
        first = new_history_file_sensor.evaluate_tick(
            dg.build_sensor_context(
                instance=instance, resources={"planning": planning}, repository_def=defs.get_repository_def()
            )
        )
        assert [r.partition_key for r in first.run_requests] == ["2026-11-23|fast", "2026-11-23|slow"]
        assert instance.get_dynamic_partitions(CYCLE) == ["2026-11-23"]
        assert instance.get_dynamic_partitions(PRODUCT_CLASS) == ["fast", "slow"]
        # the same files again: nothing to do
        again = new_history_file_sensor.evaluate_tick(
            dg.build_sensor_context(
                instance=instance,
                cursor=first.cursor,
                resources={"planning": planning},
                repository_def=defs.get_repository_def(),
            )
        )
        assert not again.run_requests and "no new or changed history file" in again.skip_message
        # a new week lands in a second file: the next cycle starts
        (folder / "history_2026-11-23.csv").write_text(
            "product,site,customer,period_start,quantity\nP,S,C,2026-11-23,4\n"
        )
        later = new_history_file_sensor.evaluate_tick(
            dg.build_sensor_context(
                instance=instance,
                cursor=first.cursor,
                resources={"planning": planning},
                repository_def=defs.get_repository_def(),
            )
        )
        assert [r.partition_key for r in later.run_requests] == ["2026-11-30|fast", "2026-11-30|slow"]
        assert len({r.run_key for r in first.run_requests + later.run_requests}) == 4


def test_sensor_skips_with_the_reason_when_the_folder_is_missing(tmp_path):
    planning = PlanningConfigResource(path=_config_file(tmp_path, tmp_path / "nowhere"))
    with dg.instance_for_test() as instance:
        tick = new_history_file_sensor.evaluate_tick(
            dg.build_sensor_context(instance=instance, resources={"planning": planning})
        )
    assert not tick.run_requests and "does not exist" in tick.skip_message


def _sharded_file(tmp_path: Path, folder: Path) -> str:
    """`fast` cut into two shards that decide their strategy at class level (two phases), `slow` one run."""
    path = Path(_config_file(tmp_path, folder))
    data = yaml.safe_load(path.read_text())
    data["product_classes"] = {
        "fast": {"window": 4, "strategy": "auto", "scale": {"shards": 2}},
        "slow": {"window": 8, "strategy": "top_down"},
    }
    path.write_text(yaml.safe_dump(data))
    return str(path)


def _first_phase_run(instance, run_key: str, status: dg.DagsterRunStatus) -> dg.DagsterRun:
    """A finished run record of shard `run_key`'s first phase, as the schedule's request tags it."""
    cycle, key = run_key.split("|")
    return instance.add_run(dg.DagsterRun(
        job_name=CYCLE_JOB, status=status,
        tags={"cycle": cycle, "product_class": key, PHASE_TAG: TO_BACKTEST},
    ))


def test_a_class_deciding_over_its_shards_is_scheduled_in_two_phases(tmp_path):
    folder = tmp_path / "in"
    _history(folder, ["P,S,C,2026-11-23,1"])
    planning = PlanningConfigResource(path=_sharded_file(tmp_path, folder))
    defs = build_definitions(planning.path)
    graph = defs.resolve_asset_graph()
    first = set(phase_selection(graph, TO_BACKTEST, None))
    with dg.instance_for_test() as instance, dg.partition_loading_context(dynamic_partitions_store=instance):
        with dg.build_schedule_context(
            instance=instance,
            scheduled_execution_time=dt.datetime(2026, 11, 30, 6, tzinfo=dt.timezone.utc),
            resources={"planning": planning},
            repository_def=defs.get_repository_def(),
        ) as context:
            requests = defs.resolve_schedule_def(CYCLE_SCHEDULE).evaluate_tick(context).run_requests
        by_key = {r.partition_key: r for r in requests}
        assert list(by_key) == ["2026-11-30|fast~1of2", "2026-11-30|fast~2of2", "2026-11-30|slow"]
        # the shards up to the backtest only, tagged; the class not cut: its whole run, as before
        for key in ("2026-11-30|fast~1of2", "2026-11-30|fast~2of2"):
            assert set(by_key[key].asset_selection) == first and by_key[key].tags[PHASE_TAG] == TO_BACKTEST
        assert by_key["2026-11-30|slow"].asset_selection is None and PHASE_TAG not in by_key["2026-11-30|slow"].tags

        def tick():
            return class_step_sensor.evaluate_tick(dg.build_sensor_context(
                instance=instance, resources={"planning": planning}, repository_def=defs.get_repository_def()))

        # one shard's backtest done: the class waits for the other
        _first_phase_run(instance, "2026-11-30|fast~1of2", dg.DagsterRunStatus.SUCCESS)
        waiting = tick()
        assert not waiting.run_requests and "waiting for the backtest of ['fast~2of2']" in waiting.skip_message
        # the other's failed: no shard goes on, and the message says what to run
        failed = _first_phase_run(instance, "2026-11-30|fast~2of2", dg.DagsterRunStatus.FAILURE)
        stopped = tick()
        assert not stopped.run_requests and "did not succeed" in stopped.skip_message
        assert "--class fast" in stopped.skip_message and failed.run_id
        # rerun and succeeded: both shards from strategy_choice on, the rest of the graph
        _first_phase_run(instance, "2026-11-30|fast~2of2", dg.DagsterRunStatus.SUCCESS)
        going = tick().run_requests
        assert [r.partition_key for r in going] == ["2026-11-30|fast~1of2", "2026-11-30|fast~2of2"]
        rest = set(graph.get_all_asset_keys()) - first
        assert all(set(r.asset_selection) == rest and r.tags[PHASE_TAG] == FROM_CHOICE for r in going)
        # once those runs exist, the next tick requests nothing again
        for r in going:
            instance.add_run(dg.DagsterRun(job_name=CYCLE_JOB, status=dg.DagsterRunStatus.NOT_STARTED, tags=r.tags))
        assert not tick().run_requests


def test_known_partitions_asks_a_found_key_once_and_a_missing_key_every_time():
    """A key found stays found for the run; a missing one is asked again (it may be added meanwhile);
    the instance's own method is back after the block. Common practice, no source."""
    from pipelines.partitions import known_partitions

    instance = dg.DagsterInstance.ephemeral()
    instance.add_dynamic_partitions(CYCLE, ["2026-11-30"])
    asked = []
    storage_has = instance._event_storage.has_dynamic_partition

    def counting(name, key):
        asked.append((name, key))
        return storage_has(name, key)

    instance._event_storage.has_dynamic_partition = counting
    with known_partitions(instance):
        with known_partitions(instance):  # nested: the outer block's answers serve
            assert instance.has_dynamic_partition(CYCLE, "2026-11-30")
        assert instance.has_dynamic_partition(CYCLE, "2026-11-30")
        assert not instance.has_dynamic_partition(CYCLE, "2026-12-07")
        instance.add_dynamic_partitions(CYCLE, ["2026-12-07"])
        assert instance.has_dynamic_partition(CYCLE, "2026-12-07")
        assert instance.has_dynamic_partition(CYCLE, "2026-12-07")
    assert asked == [(CYCLE, "2026-11-30"), (CYCLE, "2026-12-07"), (CYCLE, "2026-12-07")]
    assert "has_dynamic_partition" not in vars(instance)
    assert instance.has_dynamic_partition(CYCLE, "2026-11-30")
    assert len(asked) == 4  # asked the storage again outside the block
