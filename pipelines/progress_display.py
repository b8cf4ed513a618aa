"""The command line's progress display: per class, each stage as it runs and ends, read from the runs' events.

Every run writes its events to the Dagster instance, whichever process runs
it (this one, or a `--parallel` child). A `CycleDisplay` follows the runs it
is told of, every half second, from the last event it read: a step's start,
its tables' row counts, the `progress: done/total series` lines of the model
and backtest steps (`pipelines.progress`), and its end. It prints one line
per finished stage; on a terminal a live line per running class shows the
stage, a bar, the series done, the elapsed time and an estimate of the time
left. It keeps what it saw for the `--json` summary.
"""

from __future__ import annotations

import threading
import time
from dataclasses import dataclass, field

import dagster as dg
from rich.console import Console, Group
from rich.progress_bar import ProgressBar
from rich.table import Table
from rich.text import Text

from pipelines.progress import parse_progress, seconds_left

POLL_SECONDS = 0.5
# without a terminal (a log file, CI) a running model step prints a progress line at most this often
PLAIN_PROGRESS_SECONDS = 15.0
ROW_COUNT = "dagster/row_count"
UNREAD_BEFORE_SAYING = 20  # failed reads in a row (10 s) before the display says it cannot follow a run


@dataclass
class Stage:
    """One step of a run: an asset, or a multi-asset named by its first table."""

    name: str
    started: float  # epoch seconds of the step's start event
    status: str = "running"  # running | succeeded | failed
    seconds: float | None = None
    rows: dict[str, int] = field(default_factory=dict)  # table -> rows written
    done: int = 0
    total: int | None = None  # series to fit, when the stage reports them
    unit: str = "series"

    @property
    def main_rows(self) -> int | None:
        """The rows of the table named like the step, else of all its tables."""
        if self.name in self.rows:
            return self.rows[self.name]
        return sum(self.rows.values()) if self.rows else None

    def as_dict(self) -> dict:
        return {
            "stage": self.name,
            "status": self.status,
            "seconds": None if self.seconds is None else round(self.seconds, 3),
            "rows": self.main_rows,
            "tables": dict(self.rows),
            **({"series": self.total} if self.total is not None else {}),
        }


@dataclass
class ClassRun:
    """What the display knows of one partition's run."""

    cycle: str
    product_class: str
    run_id: str
    planned: list[str] = field(default_factory=list)  # step names in the order their tables were planned
    stages: dict[str, Stage] = field(default_factory=dict)
    cursor: str | None = None
    finished: bool = False
    last_plain: float = 0.0
    unread: int = 0  # reads of its events that failed in a row

    @property
    def running(self) -> Stage | None:
        return next((s for s in reversed(self.stages.values()) if s.status == "running"), None)

    def position(self, stage: Stage) -> str:
        """'7/19': the stage's place among the steps the run planned."""
        of = max(len(self.planned), len(self.stages))
        return f"{list(self.stages).index(stage.name) + 1}/{of}"


class CycleDisplay:
    """Follows runs in the instance and shows their progress on `console` (see the module docstring)."""

    def __init__(self, instance: dg.DagsterInstance, console: Console, live: bool | None = None, clock=time.time):
        self.instance, self.console, self.clock = instance, console, clock
        self.live = console.is_terminal if live is None else live
        self.runs: list[ClassRun] = []
        self._lock = threading.RLock()
        self._print_lock = threading.Lock()
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._live = None
        self._lines: list[str] = []  # made under the lock, printed after it (the live render takes it too)

    # ------------------------------------------------------------------ what the runner tells it
    def started(self, cycle: str, product_class: str, run_id: str) -> None:
        with self._lock:
            self.runs.append(ClassRun(cycle, product_class, run_id))

    def finished(self, run_id: str) -> None:
        """The run ended: read its last events, print its last lines."""
        with self._lock:
            run = next((r for r in self.runs if r.run_id == run_id), None)
            if run is not None:
                self._follow(run)
                run.finished = True
        self._print_lines()

    def say(self, line: str) -> None:
        """A line of the command's own (it stays above the live lines)."""
        self.console.print(line, markup=False, highlight=False, soft_wrap=True)

    # ------------------------------------------------------------------ reading the events
    def poll(self) -> None:
        with self._lock:
            for run in self.runs:
                if not run.finished:
                    self._follow(run)
        self._print_lines()

    def _print_lines(self) -> None:
        with self._print_lock:  # whoever prints, the lines come out in the order the events came
            with self._lock:
                lines, self._lines = self._lines, []
            for line in lines:
                self.say(line)

    def _follow(self, run: ClassRun) -> None:
        try:
            connection = self.instance.get_records_for_run(run.run_id, cursor=run.cursor)
        except Exception as err:  # the run's event storage busy or not there yet: read again next time
            run.unread += 1
            if run.unread == UNREAD_BEFORE_SAYING:
                self._lines.append(
                    f"  {run.product_class}: cannot read the events of run {run.run_id} ({err}); its progress "
                    "is not shown, the run goes on (its result follows)"
                )
            return
        run.unread = 0
        run.cursor = connection.cursor
        for record in connection.records:
            self._apply(run, record.event_log_entry)
        self._plain_progress(run)

    def _apply(self, run: ClassRun, entry) -> None:
        name = entry.step_key
        kind = entry.dagster_event_type
        if kind == dg.DagsterEventType.ASSET_MATERIALIZATION_PLANNED and name and name not in run.planned:
            run.planned.append(name)
        if name is None:
            return
        if kind == dg.DagsterEventType.STEP_START:
            run.stages[name] = Stage(name, entry.timestamp)
            return
        stage = run.stages.get(name)
        if stage is None:
            return
        if kind is None:
            done = parse_progress(entry.user_message)
            if done is not None:
                stage.done, stage.total, stage.unit = done.done, done.total, done.unit
        elif kind == dg.DagsterEventType.ASSET_MATERIALIZATION:
            materialization = entry.dagster_event.event_specific_data.materialization
            rows = materialization.metadata.get(ROW_COUNT)
            if rows is not None:
                stage.rows[materialization.asset_key.to_user_string()] = int(rows.value)
        elif kind in (dg.DagsterEventType.STEP_SUCCESS, dg.DagsterEventType.STEP_FAILURE):
            stage.status = "succeeded" if kind == dg.DagsterEventType.STEP_SUCCESS else "failed"
            stage.seconds = entry.timestamp - stage.started
            self._lines.append(self.stage_line(run, stage))

    # ------------------------------------------------------------------ what it shows
    def stage_line(self, run: ClassRun, stage: Stage) -> str:
        """'  consumables  13/19 backtest_accuracy      120 rows    35.1 s  (3,600 series)' for a finished stage."""
        rows = stage.main_rows
        rows_text = f"{rows:,} row{'' if rows == 1 else 's'}" if rows is not None else ""
        series = f"  ({stage.total:,} {stage.unit})" if stage.total else ""
        failed = "  FAILED" if stage.status == "failed" else ""
        return (
            f"  {run.product_class:<12} {run.position(stage):>5} {stage.name:<22} {rows_text:>13} "
            f"{stage.seconds or 0.0:>7.1f} s{series}{failed}"
        )

    def running_text(self, run: ClassRun, stage: Stage) -> str:
        """'consumables  13/19 backtest_accuracy  1,200/3,600 series  12 s, about 24 s left'."""
        elapsed = max(self.clock() - stage.started, 0.0)
        text = f"{run.product_class:<12} {run.position(stage):>5} {stage.name:<22}"
        if stage.total:
            left = seconds_left(stage.done, stage.total, elapsed)
            estimate = f", about {_duration(left)} left" if left is not None else ", estimating the time left"
            return f"{text} {stage.done:,}/{stage.total:,} {stage.unit}  {_duration(elapsed)}{estimate}"
        return f"{text} {_duration(elapsed)}"

    def _plain_progress(self, run: ClassRun) -> None:
        """Without a terminal: a running model step's progress every PLAIN_PROGRESS_SECONDS."""
        stage = run.running
        if self.live or stage is None or not stage.total or stage.done >= stage.total:
            return
        now = self.clock()
        if now - run.last_plain >= PLAIN_PROGRESS_SECONDS and now - stage.started >= PLAIN_PROGRESS_SECONDS:
            run.last_plain = now
            self._lines.append("  " + self.running_text(run, stage))

    def render(self):
        """The live lines: one per running class, with a bar where the stage reports its series."""
        with self._lock:
            grid = Table.grid(padding=(0, 1))
            grid.add_column()
            grid.add_column()
            for run in self.runs:
                stage = run.running
                if run.finished or stage is None:
                    continue
                bar = ProgressBar(total=stage.total or None, completed=stage.done, width=24)
                grid.add_row(bar, Text(self.running_text(run, stage)))
            return Group(grid)

    # ------------------------------------------------------------------ running beside the runs
    def __enter__(self) -> CycleDisplay:
        if self.live:
            from rich.live import Live

            self._live = Live(get_renderable=self.render, console=self.console, refresh_per_second=4, transient=True)
            self._live.start()
        self._thread = threading.Thread(target=self._loop, name="apportion-progress", daemon=True)
        self._thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=5)
        self.poll()
        if self._live is not None:
            self._live.stop()

    def _loop(self) -> None:
        while not self._stop.wait(POLL_SECONDS):
            self.poll()

    def summary(self) -> dict[str, dict]:
        """(cycle, class) -> the stages seen, for the --json summary."""
        with self._lock:
            return {f"{r.cycle}|{r.product_class}": {"stages": [s.as_dict() for s in r.stages.values()]}
                    for r in self.runs}


def _duration(seconds: float | None) -> str:
    if seconds is None:
        return "?"
    if seconds < 90:
        return f"{seconds:.0f} s"
    minutes, rest = divmod(int(round(seconds)), 60)
    return f"{minutes} min {rest:02d} s"
