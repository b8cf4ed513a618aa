"""The Dagster benchmark's measuring (`benchmarks/cycle_dagster.py`): wrapped calls and RSS samples on the clock of
Dagster's events, one row per step from the instance's event log, sums of rows, the JSON written as the cycle goes.

What each figure means is in `cycle_dagster.py`'s docstring.
"""

from __future__ import annotations

import argparse
import functools
import json
import threading
import time
from pathlib import Path

from cycle_measure import rss_now_mb

KINDS = ("run", "validate", "read", "write", "statsforecast")
HEADER = (
    f"{'class':<9} {'step':<24} {'wall s':>8} {'run s':>8} {'valid s':>8} {'read s':>7} {'write s':>7} "
    f"{'sf s':>8} {'other s':>7} {'rss pk':>7} {'rss end':>7} {'rows':>11}"
)


class Timeline:
    """Intervals (kind, start, end) of wrapped calls and RSS samples, on the clock of Dagster's events."""

    def __init__(self, sample_ms: float):
        self.spans: list[tuple[str, float, float]] = []
        self.samples: list[tuple[float, float]] = []
        self._stop = threading.Event()
        if sample_ms > 0:
            threading.Thread(target=self._sample, args=(sample_ms / 1000,), daemon=True).start()

    def _sample(self, interval: float) -> None:
        while not self._stop.wait(interval):
            self.samples.append((time.time(), rss_now_mb()))

    def stop(self) -> None:
        self._stop.set()

    def wrap(self, owner, name: str, kind: str) -> None:
        original = getattr(owner, name)

        @functools.wraps(original)
        def timed(*a, **k):
            t0 = time.time()
            try:
                return original(*a, **k)
            finally:
                self.spans.append((kind, t0, time.time()))

        if isinstance(owner, type) or hasattr(owner, "__dict__") and not hasattr(owner, "__dataclass_fields__"):
            setattr(owner, name, timed)
        else:  # a frozen dataclass (a StageAsset)
            object.__setattr__(owner, name, timed)

    def seconds(self, kind: str, start: float, end: float) -> float:
        return sum(min(e, end) - max(s, start) for k, s, e in self.spans if k == kind and e > start and s < end)

    def peak(self, start: float, end: float) -> float | None:
        inside = [r for t, r in self.samples if start <= t <= end]
        return max(inside) if inside else None


def instrument(timeline: Timeline) -> None:
    """Wrap the stages' runs, the validation, the IO manager and statsforecast (this process only)."""
    import statsforecast

    import assets.factory
    import assets.publication
    from assets.factory import SPECS
    from pipelines import definitions  # noqa: F401  (makes every stage asset, so SPECS holds them all)
    from pipelines.resources import PartitionStore

    for spec in SPECS.values():
        timeline.wrap(spec, "run", "run")
    timeline.wrap(assets.factory, "validate", "validate")
    timeline.wrap(assets.publication, "validate", "validate")
    timeline.wrap(PartitionStore, "load_input", "read")
    timeline.wrap(PartitionStore, "handle_output", "write")
    for method in ("fit", "predict", "forecast"):
        timeline.wrap(statsforecast.StatsForecast, method, "statsforecast")


def step_rows(instance, run_id: str, timeline: Timeline, product_class: str, now: float | None = None) -> list[dict]:
    """One row per step of the run, from its events' timestamps and the timeline; a step not ended yet measured
    up to `now` (time.time(); None: as ended at its start, failed)."""
    import dagster as dg

    starts, ends, rows = {}, {}, {}
    for entry in instance.all_logs(run_id):
        event = entry.dagster_event
        if event is None or not event.step_key:
            continue
        key = event.step_key
        if event.event_type == dg.DagsterEventType.STEP_START:
            starts[key] = entry.timestamp
        elif event.event_type in (dg.DagsterEventType.STEP_SUCCESS, dg.DagsterEventType.STEP_FAILURE):
            ends[key] = (entry.timestamp, event.event_type == dg.DagsterEventType.STEP_SUCCESS)
        elif event.event_type == dg.DagsterEventType.ASSET_MATERIALIZATION:
            count = event.event_specific_data.materialization.metadata.get("dagster/row_count")
            rows[key] = rows.get(key, 0) + (count.value if count is not None else 0)
    out = []
    for key, start in sorted(starts.items(), key=lambda kv: kv[1]):
        end, ok = ends.get(key, (start if now is None else now, False))
        row = {"class": product_class, "step": key, "success": ok, "wall_s": end - start}
        if now is not None:
            row["finished"] = key in ends
        for kind in KINDS:
            row[f"{kind}_s"] = timeline.seconds(kind, start, end)
        parts = [row[f"{k}_s"] for k in ("run", "validate", "read", "write")]
        row["other_s"] = None if None in parts else row["wall_s"] - sum(parts)  # None: run in another process
        row["rss_peak_mb"] = timeline.peak(start, end)
        row["rss_end_mb"] = timeline.peak(end - 0.05, end + 0.05)
        row["rows"] = rows.get(key)
        out.append(row)
    return out


def format_row(r: dict) -> str:
    def mb(v):
        return "" if v is None else f"{v:.0f}"

    def s(key, width):
        return f"{'':>{width}}" if r[key] is None else f"{r[key]:>{width}.2f}"

    rows = "" if r.get("rows") is None else f"{r['rows']:,}"
    return (
        f"{r['class']:<9} {r['step'][:24]:<24} {r['wall_s']:>8.2f} {s('run_s', 8)} {s('validate_s', 8)} "
        f"{s('read_s', 7)} {s('write_s', 7)} {s('statsforecast_s', 8)} {s('other_s', 7)} "
        f"{mb(r['rss_peak_mb']):>7} {mb(r['rss_end_mb']):>7} {rows:>11}"
        + ("" if r.get("success", True) else "  FAILED")
    )


def totals(rows: list[dict], label: str, product_class: str = "") -> dict:
    t = {"class": product_class, "step": label, "rows": None}
    for key in ("wall_s", "run_s", "validate_s", "read_s", "write_s", "statsforecast_s", "other_s"):
        known = [r[key] for r in rows if r[key] is not None]
        t[key] = sum(known) if known or not rows else None  # None: measured in no run (--parallel)
    peaks = [r["rss_peak_mb"] for r in rows if r["rss_peak_mb"] is not None]
    t["rss_peak_mb"] = max(peaks) if peaks else None
    t["rss_end_mb"] = rows[-1]["rss_end_mb"] if rows else None
    if t["statsforecast_s"] is None:  # --parallel: no split of the steps' time
        t["own_s"] = t["validation_share_of_own"] = t["validation_share_of_stages"] = None
        t["success"] = all(r.get("success", True) for r in rows)
        return t
    own = t["wall_s"] - t["statsforecast_s"]
    t["own_s"] = own
    t["validation_share_of_own"] = t["validate_s"] / own if own > 0 else None
    # as benchmarks/cycle.py counts own time: the stages' runs and their validation, without statsforecast
    stages = t["run_s"] + t["validate_s"] - t["statsforecast_s"]
    t["validation_share_of_stages"] = t["validate_s"] / stages if stages > 0 else None
    t["success"] = all(r.get("success", True) for r in rows)
    return t


class Progress:
    """Every `--progress-s` seconds (with `--json`), the figures so far written with the finished steps of the
    runs still going (`running`; the step under way measured so far, `finished` false), read from the instance's
    event log by a thread of its own (its own instance)."""

    def __init__(self, args: argparse.Namespace, figures, timeline, samplers: list):
        self.args, self.figures, self.timeline, self.samplers = args, figures, timeline, samplers
        self._stop = threading.Event()
        self.thread = None
        if args.json and args.progress_s > 0:
            self.thread = threading.Thread(target=self._loop, daemon=True)
            self.thread.start()

    def _loop(self) -> None:
        import dagster as dg
        from dagster_parallel import ChildTimeline

        with dg.DagsterInstance.get() as instance:
            while not self._stop.wait(self.args.progress_s):
                running = []
                try:
                    for run in instance.get_runs(filters=dg.RunsFilter(statuses=[dg.DagsterRunStatus.STARTED])):
                        label = run.tags.get("dagster/partition", run.run_id[:8])
                        measured = self.timeline or ChildTimeline(self.samplers[0] if self.samplers else None,
                                                                  run.run_id)
                        running.append({"run_id": run.run_id, "partition": label,
                                        "steps": step_rows(instance, run.run_id, measured, label, time.time())})
                    write_json(self.args, self.figures(running))
                except Exception as err:  # a figure missed is no reason to stop the cycle
                    print(f"progress: {type(err).__name__}: {err}", flush=True)

    def stop(self) -> None:
        self._stop.set()
        if self.thread is not None:
            self.thread.join(timeout=30)


def write_json(args: argparse.Namespace, result: dict) -> bool:
    """The figures so far (after each class, `complete` false; at the end, true)."""
    if not args.json:
        return False
    Path(args.json).parent.mkdir(parents=True, exist_ok=True)
    Path(args.json).write_text(json.dumps(result, indent=2, default=str))
    return True
