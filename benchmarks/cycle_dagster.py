"""The cycle through Dagster: the benchmark's scenario as input files, every class partition materialized.

    .venv/bin/python benchmarks/cycle_dagster.py --leaves 10000 [--seed 7] [--periods 156] [--horizon 26]
        [--classes fast,seasonal,slow] [--backtest light|full] [--n-jobs N] [--folder PATH]
        [--rss-sample-ms MS] [--slices N] [--shard-leaves L] [--parallel K] [--json PATH]
        [--scenario-cache DIR] [--partitions KEY,KEY] [--progress-s S]

Where `benchmarks/cycle.py` calls the stages' `run(...)` itself, this one runs
what a platform team runs: the same seeded scenario (`cycle_scenario.generate`,
the config of `cycle_inputs.config_data`) written as input files (history as
`history_<year>.csv`, the master data and planner input as CSV files) and a
YAML config (`--backtest light`, the default: the backtest, which the graph
always runs and `cycle.py` leaves out, with one origin and `top_down` only,
enough for classes whose strategy and shares are fixed; `full`: the config's
four origins and five strategies), then the real asset graph (`pipelines.definitions`), one run of
the job `planning_cycle` per class partition of the cycle 2026-11-30, in this
process, through `pipelines.runner.run_partitions` (what `python -m pipelines
cycle` does without `--parallel`): the IO manager writes every table to the
store and reads it back for the next asset, every schema and rule check runs,
the last step publishes the class. A temporary folder (or `--folder`) holds the
inputs, the store, the reports and its own DAGSTER_HOME (a SQLite instance).

The scenario is generated in a forked child process, so this process's memory
is the cycle's own. Per step (a Dagster step: an asset or multi-asset) it
reports:

    wall s     from the step's STEP_START to its STEP_SUCCESS / STEP_FAILURE event (their timestamps in the
               instance's event log)
    run s      inside the stage's own `run(...)` (its spec in `assets.factory.SPECS`, wrapped in this process)
    valid s    inside the pandera validation of its outputs (`assets.factory.validate`,
               `assets.publication.validate`)
    read s     the IO manager's `load_input` (Parquet from the store); write s: its `handle_output`
    sf s       inside StatsForecast fit / predict / forecast (of run s)
    other s    wall minus run, valid, read and write: Dagster's events and checks, metadata, the factory
    rss pk     the process RSS peak during the step, from a thread reading /proc/self/statm every
               `--rss-sample-ms` (10 ms); rss end: RSS at the step's end
    rows       the rows of the step's tables (`dagster/row_count` of its materializations)

`--slices N`: N independent slices (seeds seed + i) in one input folder;
`--shard-leaves L`: each class cut into ceil(its leaves / L) shards, a
partition each (`benchmarks/dagster_inputs.py`); `--parallel K`: K partitions
at a time, a process each, as `cycle --parallel K` (per step wall, peak and
rows only; `benchmarks/dagster_parallel.py`). A table sums each step over
the partitions. `--scenario-cache DIR`: each slice read from the cache of
`benchmarks/scenario_cache.py` (leaves / N leaves, seed + i), generated there
first when missing. `--partitions KEY,...`: only these partitions (class keys,
or a sharded class's shard keys such as `fast~2of10`, in the given order);
the cut still covers every class, as in the whole cycle.

Each class's run ends with a `steps` line (the sum of its steps; `job` the
whole run, from the job's start to its end, partition lock included) and the cycle with a `total` line: own time (wall
minus statsforecast) and validation's share of it. `--json PATH` writes every
figure with the load average at start and end, the scenario and the versions;
it is written as the cycle goes (`complete` false): after each partition, and
every `--progress-s` seconds (60) with the steps so far of the runs still
going (`running`: wall and peak of each step, the one under way up to then),
so a cycle cut short leaves its figures.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

import yaml

ROOT = Path(__file__).resolve().parents[1]
for path in (ROOT, ROOT / "benchmarks"):
    if str(path) not in sys.path:
        sys.path.insert(0, str(path))

from cycle_inputs import config_data  # noqa: E402
from cycle_measure import git_commit, load_average, rss_max_mb, rss_now_mb, versions  # noqa: E402
from cycle_scenario import CLASSES, CYCLE_DATE, generate  # noqa: E402
from dagster_inputs import forked, shard_counts, write_slices  # noqa: E402
from dagster_measure import HEADER, Progress, Timeline, format_row, instrument, step_rows, totals, write_json  # noqa: E402
from dagster_parallel import STEP_HEADER, format_step, per_step, run_parallel  # noqa: E402

CYCLE = str(CYCLE_DATE)
# the graph always runs backtest_accuracy; no class of the benchmark is `auto`, so by default it runs small
LIGHT_BACKTEST = {"origins": 1, "strategies": ["top_down"]}
# =================================================================== inputs
def write_inputs(args: argparse.Namespace, folder: Path) -> dict:
    """The scenario as input files and a config (in a forked child, so its memory is not the cycle's)."""
    return forked("generating the scenario", _write_inputs, args, folder)


def _write_inputs(args: argparse.Namespace, folder: Path) -> dict:
    started = time.perf_counter()
    inputs = folder / "inputs"
    if args.slices > 1 or args.shard_leaves or args.scenario_cache:
        cache = Path(args.scenario_cache) if args.scenario_cache else None
        facts = write_slices(args.leaves, args.slices, args.seed, args.periods, args.horizon, inputs, cache)
    else:
        scen = generate(args.leaves, args.seed, args.periods, inputs, args.horizon)
        frames = {"products": scen.products, "customer_spans": scen.spans, "adjustments": scen.adjustments,
                  "pins": scen.pins, "shortages": scen.shortages}
        for name, frame in frames.items():
            frame.to_csv(inputs / f"{name}.csv", index=False, lineterminator="\n")
        facts = scen.facts
    data = config_data(args.periods, args.horizon, False, None, n_jobs=args.n_jobs)
    if args.shard_leaves:
        facts["shards"] = shard_counts(facts["leaves_per_class"], args.shard_leaves)
        for k, n in facts["shards"].items():
            data["product_classes"][k]["scale"] = {"shards": n}
    if args.backtest == "light":
        data["backtest"] = LIGHT_BACKTEST
    data["inputs"] = {"folder": str(inputs)}
    data["store"] = {"path": str(folder / "var" / "store")}
    (folder / "planning.yaml").write_text(yaml.safe_dump(data, sort_keys=False))
    return {**facts, "generate_s": round(time.perf_counter() - started, 2)}


# =================================================================== the cycle
def run_cycle(args: argparse.Namespace) -> dict:
    load_start = load_average()
    tmp = None if args.folder else tempfile.TemporaryDirectory(prefix="apportion-dagster-bench-")
    folder = Path(args.folder or tmp.name).resolve()
    folder.mkdir(parents=True, exist_ok=True)
    classes = [c.strip() for c in args.classes.split(",") if c.strip()]
    unknown = sorted(set(classes) - set(CLASSES))
    if unknown:
        raise SystemExit(f"--classes: unknown {unknown}; choose from {list(CLASSES)}")
    commit = git_commit()  # of the code this process imports, taken before the run
    print(f"apportion cycle through Dagster: {args.leaves:,} leaves, seed {args.seed}, {args.periods} weekly periods, "
          f"horizon {args.horizon}, classes {','.join(classes)}, n_jobs {args.n_jobs}, folder {folder}, "
          f"commit {(commit or '?')[:8]}", flush=True)
    facts = write_inputs(args, folder)
    print(f"inputs written in {facts['generate_s']:.1f} s (not timed): {facts['lines']:,} history lines, "
          f"{facts['parents']:,} parents; rss now {rss_now_mb():.0f} MB", flush=True)
    home = folder / "dagster_home"
    home.mkdir(exist_ok=True)
    (home / "dagster.yaml").write_text("telemetry:\n  enabled: false\n")
    os.environ["DAGSTER_HOME"] = str(home)

    import dagster as dg

    from pipelines.definitions import build_definitions
    from pipelines.runner import run_partitions
    from pipelines.shards import partition_classes

    timeline = Timeline(args.rss_sample_ms if args.parallel == 1 else 0)
    instrument(timeline)
    config_path = str(folder / "planning.yaml")
    defs = build_definitions(config_path)
    config = defs.resources["planning"].config
    keys, every = partition_classes(config, classes), partition_classes(config)  # a class cut: its shards
    if args.partitions:
        keys = [k.strip() for k in args.partitions.split(",") if k.strip()]
        if set(keys) - set(every):
            raise SystemExit(f"--partitions: unknown {sorted(set(keys) - set(every))}; the cycle's are {every}")
    steps: list[dict] = []
    runs: list[dict] = []
    print(f"{HEADER}\n{'-' * len(HEADER)}", flush=True)
    quiet = {"loggers": {"console": {"config": {"log_level": "CRITICAL"}}}}  # as `cycle` without --verbose
    started = time.monotonic()
    samplers: list = []  # --parallel: the sampler of the runs' process trees (their peaks)
    with dg.DagsterInstance.get() as instance:
        progress = Progress(args, lambda running: {
            "parameters": vars(args), "scenario": facts, "steps": steps, "runs": runs, "running": running,
            "load": {"start": load_start, "so_far": load_average()}, "complete": False},
            timeline if args.parallel == 1 else None, samplers)

        def done(label: str, run_id: str, seconds: float, measured, success: bool) -> None:
            mine = step_rows(instance, run_id, measured, label)
            for row in mine:
                print(format_row(row), flush=True)
            run = {**totals(mine, "steps", label), "job_s": seconds, "run_id": run_id}
            run["success"] = run["success"] and success
            print(format_row(run) + f"  job {seconds:.2f} s", flush=True)
            steps.extend(mine)
            runs.append(run)
            write_json(args, {"parameters": vars(args), "scenario": facts, "steps": steps, "runs": runs,
                              "load": {"start": load_start, "so_far": load_average()}, "complete": False})

        if args.parallel > 1:
            together = run_parallel(config_path, instance, CYCLE, keys, every, args.parallel, quiet, done,
                                    on_sampler=samplers.append)
        else:
            run_partitions(defs, instance, CYCLE, keys, all_classes=every, run_config=quiet, say=print,
                           on_done=lambda k, r, sec: done(k, r.run_id, sec, timeline, r.success))
            together = {"elapsed_s": time.monotonic() - started, "parallel": 1, "peak_sum_rss_mb": None}
        progress.stop()
    timeline.stop()
    total = totals(steps, "total")
    print(f"{'-' * len(HEADER)}\n{format_row(total)}")
    # what benchmarks/cycle.py counts: every step but the backtest (Dagster's own steps included here)
    without = totals([r for r in steps if r["step"] != "backtest_accuracy"], "total w/o backtest")
    share = without["validation_share_of_own"]
    print(format_row(without) + ("" if share is None else f"  validation {share:.1%} of own"))
    share, stages = total["validation_share_of_own"] or 0.0, total["validation_share_of_stages"] or 0.0
    if total["own_s"] is not None:
        print(f"own {total['own_s']:.2f} s (wall {total['wall_s']:.2f} minus statsforecast "
              f"{total['statsforecast_s']:.2f}); validation {total['validate_s']:.2f} s = {share:.1%} of own, "
              f"{stages:.1%} of the stages' own (run + validation - statsforecast); store read "
              f"{total['read_s']:.2f} s, write {total['write_s']:.2f} s; Dagster and the factory (other) "
              f"{total['other_s']:.2f} s; ru_maxrss {rss_max_mb():.0f} MB")
    by_step = per_step(steps)
    print(f"\n{STEP_HEADER}\n" + "\n".join(format_step(r) for r in by_step))
    peak = together["peak_sum_rss_mb"] if args.parallel > 1 else total["rss_peak_mb"]
    print(f"{len(keys)} partitions ({', '.join(keys)}), {args.parallel} at a time: elapsed "
          f"{together['elapsed_s']:.1f} s (steps summed {total['wall_s']:.1f} s); peak {(peak or 0) / 1024:.2f} GB ("
          + ("largest sum of the runs' process trees' RSS sampled at once, PSS "
             f"{(together['peak_sum_pss_mb'] or 0) / 1024:.2f} GB)" if args.parallel > 1 else "this process's RSS)"))
    load = {"start": load_start, "end": load_average()}
    print("load average (1 / 5 / 15 min), start and end: " + "; ".join(
        f"{v['load_1m']:.2f} / {v['load_5m']:.2f} / {v['load_15m']:.2f} at {v['at']}" for v in load.values()))
    result = {
        "parameters": vars(args),
        "scenario": facts,
        "steps": steps,
        "runs": runs,
        "total": {**total, "rss_max_mb": rss_max_mb()},
        "total_without_backtest": without,
        "per_step": by_step,
        "partitions": keys,
        "whole": {**together, "peak_mb": peak},
        "load": load,
        "versions": {**versions(), "commit": commit},
        "complete": True,
    }
    if write_json(args, result):
        print(f"wrote {args.json}")
    if tmp is not None:
        tmp.cleanup()
    return result


def parse_args(argv: list[str] | None = None) -> argparse.Namespace:
    p = argparse.ArgumentParser(prog="benchmarks/cycle_dagster.py", description=__doc__.splitlines()[0])
    p.add_argument("--leaves", type=int, required=True, help="number of leaf series (product x site x customer)")
    p.add_argument("--seed", type=int, default=7, help="generator seed (default 7)")
    p.add_argument("--periods", type=int, default=156, help="weeks of history (default 156)")
    p.add_argument("--horizon", type=int, default=26, help="weeks to forecast (default 26)")
    p.add_argument("--classes", default=",".join(CLASSES), help="class partitions to run, in order (default all)")
    p.add_argument("--backtest", choices=("light", "full"), default="light",
                   help="light (default): backtest.origins 1, strategies [top_down]; full: the config's defaults "
                   "(4 origins, 5 strategies, at both grains)")
    p.add_argument("--n-jobs", type=int, default=1, help="execution.n_jobs: statsforecast processes (default 1)")
    p.add_argument("--folder", default=None, help="keep inputs, store, reports and DAGSTER_HOME here (default: "
                   "a temporary folder, removed at the end)")
    p.add_argument("--rss-sample-ms", type=float, default=10.0, help="RSS sampling interval; 0 = off (default 10)")
    p.add_argument("--slices", type=int, default=1, help="independent slices of the scenario (seeds seed + i)")
    p.add_argument("--shard-leaves", type=int, default=0, metavar="L",
                   help="cut each class into ceil(its leaves / L) shards (default 0: not cut)")
    p.add_argument("--parallel", type=int, default=1, metavar="K", help="partitions at once, a process each")
    p.add_argument("--json", default=None, metavar="PATH", help="write the figures as JSON")
    p.add_argument("--scenario-cache", default=None, metavar="DIR",
                   help="read each slice's scenario from this cache (benchmarks/scenario_cache.py)")
    p.add_argument("--partitions", default=None, metavar="KEYS",
                   help="only these partitions, comma-separated (e.g. fast~1of10,slow~3of6)")
    p.add_argument("--progress-s", type=float, default=60.0,
                   help="with --json: write the figures so far every S seconds (0: after each partition only)")
    args = p.parse_args(argv)
    if args.leaves < 1 or args.periods < 8 or args.horizon < 1 or args.slices < 1 or args.parallel < 1:
        p.error("--leaves, --slices, --parallel >= 1, --periods >= 8 and --horizon >= 1")
    return args


if __name__ == "__main__":
    run_cycle(parse_args())
