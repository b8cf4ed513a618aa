"""The Dagster benchmark's runs K at a time (`cycle_dagster.py --parallel K`), as `cycle --parallel K` runs them.

`run_parallel` calls `pipelines.runner.run_partitions_parallel`: each
partition (a class, or a shard of a class cut into shards) runs in a spawned
process of its own, K at a time. Those processes are not this one, so the
stages' run, validation, store and statsforecast seconds (`run s` ... `sf
s`, wrapped in this process by `cycle_dagster.instrument`) are not measured
(empty); per step there remain:

    wall s    STEP_START to STEP_SUCCESS / STEP_FAILURE in the instance's event log, as without --parallel
    rss pk    the largest RSS of the run's process tree (its process and any statsforecast workers) sampled
              every 0.1 s during the step (`benchmarks/process_memory.py`); rss end: a sample at its end
    rows      `dagster/row_count` of its materializations

and for the whole cycle the elapsed wall time (the cut of the history
included: the first partition to need it cuts it while the others wait in
their `raw_history` step) and the peak of the runs together: the largest sum
of the running trees' RSS (and PSS) sampled at one moment.

`per_step` sums a step's figures over the partitions (wall added, peak the
largest, rows added).
"""

from __future__ import annotations

import multiprocessing.context
import time

from process_memory import TreeSampler


class ChildTimeline:
    """`cycle_dagster.Timeline`'s questions for runs in other processes: peaks from the sampler, no seconds."""

    def __init__(self, sampler: TreeSampler, run_id: str):
        self.sampler, self.run_id = sampler, run_id

    def seconds(self, kind: str, start: float, end: float) -> None:
        return None

    def peak(self, start: float, end: float) -> float | None:
        return self.sampler.peak_mb(self.run_id, start, end)


def run_parallel(config_path: str, instance, cycle: str, keys: list[str], every: list[str], parallel: int,
                 run_config: dict, done, on_sampler=None) -> dict:
    """Run `keys` `parallel` at a time; `done(label, run_id, seconds, timeline)` after each; the peaks and the
    elapsed seconds. `on_sampler(sampler)`: told the sampler of the runs' memory before they start."""
    from pipelines.runner import run_partitions_parallel

    sampler = TreeSampler(0.1)
    if on_sampler is not None:
        on_sampler(sampler)
    starting: list[str] = []
    spawn = multiprocessing.context.SpawnProcess
    original = spawn.start

    def start(process):  # the run's process, watched under its run id (on_start names it just before)
        original(process)
        if starting:
            sampler.watch(starting.pop(), process.pid)

    def on_start(i: int, label: str, run_id: str) -> None:
        print(f"[{i}/{len(keys)}] {label} started (run {run_id[:8]})", flush=True)
        starting.append(run_id)

    def on_done(outcome) -> None:
        sampler.forget(outcome.run_id)
        done(outcome.product_class, outcome.run_id, outcome.seconds, ChildTimeline(sampler, outcome.run_id),
             outcome.success)

    spawn.start = start
    started = time.monotonic()
    try:
        run_partitions_parallel(config_path, instance, cycle, keys, parallel=parallel, all_classes=every,
                                run_config=run_config, on_start=on_start, on_done=on_done)
    finally:
        spawn.start = original
        sampler.stop()
    return {"elapsed_s": time.monotonic() - started, "parallel": parallel,
            "peak_sum_rss_mb": sampler.peak_sum_mb("rss"), "peak_sum_pss_mb": sampler.peak_sum_mb("pss"),
            "most_runs_at_once": sampler.most_at_once(), "sample_s": 0.1}


def per_step(steps: list[dict]) -> list[dict]:
    """One row per step name, in the order steps first ran: wall and rows added over the partitions, the largest
    peak, the partitions counted."""
    out: dict[str, dict] = {}
    for r in steps:
        row = out.setdefault(r["step"], {"step": r["step"], "runs": 0, "wall_s": 0.0, "rss_peak_mb": None,
                                         "rows": None, "success": True})
        row["runs"] += 1
        row["wall_s"] += r["wall_s"]
        if r.get("rss_peak_mb") is not None:
            row["rss_peak_mb"] = max(row["rss_peak_mb"] or 0.0, r["rss_peak_mb"])
        if r.get("rows") is not None:
            row["rows"] = (row["rows"] or 0) + r["rows"]
        row["success"] = row["success"] and r.get("success", True)
    return list(out.values())


def format_step(r: dict) -> str:
    peak = "" if r["rss_peak_mb"] is None else f"{r['rss_peak_mb']:.0f}"
    rows = "" if r["rows"] is None else f"{r['rows']:,}"
    return f"{r['step'][:24]:<24} {r['runs']:>5} {r['wall_s']:>9.2f} {peak:>8} {rows:>13}" + (
        "" if r["success"] else "  FAILED")


STEP_HEADER = f"{'step (summed over runs)':<24} {'runs':>5} {'wall s':>9} {'rss pk':>8} {'rows':>13}"
