"""Progress lines of the model steps and the estimate of the time left, without a Dagster run."""

from __future__ import annotations

import numpy as np
import pytest
from rich.console import Console

from pipelines.engines.models import run_model_groups
from pipelines.engines.series_grids import series_grid
from pipelines.progress import MIN_SECONDS_BETWEEN_LINES, Done, SeriesProgress, parse_progress, seconds_left
from pipelines.progress_display import UNREAD_BEFORE_SAYING, ClassRun, CycleDisplay, Stage


class Clock:
    def __init__(self, now: float = 0.0):
        self.now = now

    def __call__(self) -> float:
        return self.now


def test_progress_lines_round_trip_and_other_messages_are_not_progress():
    assert parse_progress(Done(40, 120).line) == Done(40, 120, "series")
    assert parse_progress("progress: 3/9 origins") == Done(3, 9, "origins")
    for message in ("ETS(A,N,A) s=12: 4 series in 0.1 s", "progress: 3 of 9", "", None):
        assert parse_progress(message) is None


def test_series_progress_writes_at_most_a_line_a_second_and_always_the_last():
    lines, clock = [], Clock()
    progress = SeriesProgress(10, lines.append, clock=clock)
    progress.advance(2)  # the first line at once
    clock.now += MIN_SECONDS_BETWEEN_LINES / 2
    progress.advance(3)  # too soon: no line
    clock.now += MIN_SECONDS_BETWEEN_LINES
    progress.advance(1)
    progress.advance(4)  # the total reached: written however soon
    assert lines == ["progress: 2/10 series", "progress: 6/10 series", "progress: 10/10 series"]
    with pytest.raises(ValueError, match="11 series done of a total of 10"):
        progress.advance(1)


def test_time_left_at_the_pace_so_far():
    # 100 of 400 series in 30 s: 300 more at 0.3 s each
    assert seconds_left(100, 400, 30.0) == pytest.approx(90.0)
    assert seconds_left(400, 400, 30.0) == 0.0
    assert seconds_left(0, 400, 30.0) is None  # nothing done yet: no estimate


def test_the_running_line_shows_stage_series_elapsed_and_time_left():
    clock = Clock(1_000.0)
    display = CycleDisplay(instance=None, console=Console(record=True, width=120), live=False, clock=clock)
    run = ClassRun("2026-11-30", "seasonal", "run-1", planned=[f"s{i}" for i in range(19)])
    for i in range(12):
        run.stages[f"s{i}"] = Stage(f"s{i}", 0.0, status="succeeded", seconds=1.0)
    stage = run.stages["backtest_accuracy"] = Stage("backtest_accuracy", 970.0, done=1_200, total=3_600)
    text = display.running_text(run, stage)
    assert text == "seasonal     13/19 backtest_accuracy      1,200/3,600 series  30 s, about 60 s left"
    stage.done = 0
    assert display.running_text(run, stage).endswith("0/3,600 series  30 s, estimating the time left")
    stage.total = None  # a stage that does not count series: its elapsed time only
    assert display.running_text(run, stage).endswith("backtest_accuracy      30 s")
    stage.status, stage.seconds, stage.rows = "succeeded", 42.0, {"backtest_accuracy": 96}
    assert display.stage_line(run, stage) == (
        "  seasonal     13/19 backtest_accuracy            96 rows    42.0 s"
    )


def test_model_groups_count_every_series_once():
    # 5 series: two with demand history, three without (forecast zero, still counted done)
    code = np.array([0, 0, 0, 1, 1, 1, 1])
    ordinal = np.array([0, 1, 2, 0, 1, 2, 3])
    qty = np.array([3.0, 4.0, 5.0, 1.0, 0.0, 2.0, 1.0])
    grid = series_grid(code, ordinal, qty, 5, 4)
    names = np.array(["ses", "seasonal_naive", "zero", "zero", "zero"], dtype=object)
    counted = []
    run_model_groups(grid, names, np.ones(5, dtype=int), 2, progress=counted.append)
    assert sum(counted) == 5 and sorted(counted) == [1, 1, 3]


def test_a_run_whose_events_cannot_be_read_is_named_once_and_not_silently_dropped():
    class Unreadable:
        def get_records_for_run(self, run_id, cursor=None):
            raise RuntimeError("database is locked")

    console = Console(record=True, width=200)
    display = CycleDisplay(instance=Unreadable(), console=console, live=False)
    display.started("2026-11-30", "spares", "run-9")
    for _ in range(UNREAD_BEFORE_SAYING * 3):
        display.poll()
    said = console.export_text().splitlines()
    assert said == [
        "  spares: cannot read the events of run run-9 (database is locked); its progress is not shown, the run "
        "goes on (its result follows)"
    ]


def test_a_series_without_rows_given_a_model_is_counted_and_forecast_zero():
    # series 1 has no rows at all but is named for a model: nothing to fit, 0, still counted done
    grid = series_grid(np.array([0, 0, 0]), np.array([0, 1, 2]), np.array([3.0, 4.0, 5.0]), 2, 3)
    counted = []
    run = run_model_groups(grid, np.array(["ses", "ses"], dtype=object), np.ones(2, dtype=int), 2,
                           progress=counted.append)
    assert sum(counted) == 2 and run.forecast[1].tolist() == [0.0, 0.0] and run.forecast[0, 0] > 0
