"""One class of the demo through the command line: wall and cpu per run, per step, and the imports (issue 15).

    .venv/bin/python benchmarks/small_class.py [--class consumables] [--config config/planning.weekly.yaml]
        [--work /tmp/small-class] [--runs 2] [--profile [--timer cpu]] [--tree DIR]
        [--json benchmarks/results/small-class-consumables.json]

Copies the config with `store.path` (and `inputs.folder`, made absolute) under
`--work`, makes a fresh `DAGSTER_HOME` there, and runs
`python -m pipelines cycle --config COPY --class CLASS` `--runs` times in a
child process each: the first run cold (empty store, new instance), the rest
warm (the same cycle again into the same store and instance). Each run's wall
time is taken around the child, its cpu (user + sys) from `getrusage` of the
children (the model pool's forkserver and workers too: this process adopts
the orphans a run leaves and waits for them, `cpu_counts_orphans`), and the
time per step from the run's own events in the instance
(STEP_START to STEP_SUCCESS). `imports` is a fresh child importing what the
command line imports before the first step (the command, the definitions, and
every module `defs` pulls in), with the heavy libraries it loaded listed.
`--profile` runs one more cycle in this process under cProfile (`--timer cpu`:
by this process's cpu time, the model pool's workers not counted) and prints
the 25 functions of most cumulative time (the stats file is kept in `--work`
as profile.prof; it runs this file's tree, whatever `--tree` says). `--tree DIR` runs the
command line of another source tree (e.g. `git archive BASE | tar -x -C DIR`)
on the same inputs, for a before / after pair; `--config` defaults to that
tree's `config/planning.weekly.yaml` (an older tree refuses a key it does not know). The machine's load
(`os.getloadavg`, as `uptime` prints it) is recorded before and after each
figure.
"""

from __future__ import annotations

import argparse
import cProfile
import io
import json
import os
import pstats
import resource
import shutil
import subprocess
import sys
import time
from pathlib import Path

import yaml

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
from benchmarks.cycle_measure import load_average  # noqa: E402

HEAVY = (
    "dagster",
    "pandas",
    "pandera",
    "statsforecast",
    "statsmodels",
    "scipy",
    "matplotlib",
    "duckdb",
    "dask",
    "sklearn",
    "numba",
)
IMPORTS = (
    "import time, sys; t0 = time.perf_counter(); "
    "import pipelines.__main__; t1 = time.perf_counter(); "
    "from pipelines.definitions import build_definitions; build_definitions(sys.argv[1]); "
    "t2 = time.perf_counter(); import json; "
    "print(json.dumps({'command_s': t1 - t0, 'definitions_s': t2 - t1, 'total_s': t2 - t0, "
    "'loaded': sorted(m for m in sys.modules if '.' not in m)}))"
)


def cpu_children() -> float:
    usage = resource.getrusage(resource.RUSAGE_CHILDREN)
    return usage.ru_utime + usage.ru_stime


def adopt_orphans() -> bool:
    """Make this process the reaper of its descendants' orphans (Linux `PR_SET_CHILD_SUBREAPER`).

    The model pool's forkserver outlives the command by a moment and is never
    waited for by it, so without this its cpu and its workers' (which it reaps)
    would be counted by no one here; with it they come back to this process and
    `reap_orphans` waits for them. False where the call is not available."""
    try:
        import ctypes

        return ctypes.CDLL(None, use_errno=True).prctl(36, 1, 0, 0, 0) == 0
    except (OSError, AttributeError):
        return False


def reap_orphans(timeout: float = 30.0) -> int:
    """Wait for the orphans a run left (its pool's forkserver), so their cpu is in `cpu_children`; how many."""
    deadline, count = time.monotonic() + timeout, 0
    while True:
        try:
            pid, _ = os.waitpid(-1, os.WNOHANG)
        except ChildProcessError:
            return count
        if pid:
            count += 1
        elif time.monotonic() > deadline:
            return count
        else:
            time.sleep(0.05)


def prepare(args: argparse.Namespace) -> tuple[Path, dict]:
    """A fresh work folder: the config copy (own store, absolute inputs) and an empty DAGSTER_HOME."""
    work = Path(args.work)
    shutil.rmtree(work, ignore_errors=True)
    (work / "dagster_home").mkdir(parents=True)
    config_path = Path(args.config).resolve()
    config = yaml.safe_load(config_path.read_text())
    folder = Path(config["inputs"]["folder"])
    config["inputs"]["folder"] = str(folder if folder.is_absolute() else (ROOT / folder).resolve())
    config["store"]["path"] = str(work / "store")
    copy = work / "planning.yaml"
    copy.write_text(yaml.safe_dump(config, sort_keys=False))
    env = dict(os.environ, DAGSTER_HOME=str(work / "dagster_home"), PYTHONPATH=str(args.tree))
    return copy, env


def time_imports(args: argparse.Namespace, copy: Path, env: dict) -> dict:
    load = load_average()
    before = cpu_children()
    started = time.monotonic()
    out = subprocess.run(
        [sys.executable, "-c", IMPORTS, str(copy)], cwd=args.tree, env=env, capture_output=True, text=True, check=True
    )
    figures = json.loads(out.stdout.strip().splitlines()[-1])
    figures["wall_s"] = time.monotonic() - started
    figures["cpu_s"] = cpu_children() - before
    loaded = set(figures.pop("loaded"))
    figures["heavy_loaded"] = [m for m in HEAVY if m in loaded]
    figures["load_before"], figures["load_after"] = load, load_average()
    return figures


def step_times(dagster_home: Path) -> tuple[str, list[dict]]:
    """The last run's steps, in the order they started: (run id, [{step, wall_s, start, end}]), the times of
    day (epoch seconds) of each step's start and end event."""
    import dagster as dg

    instance = dg.DagsterInstance.from_config(str(dagster_home))
    run = instance.get_runs(limit=1)[0]
    starts, ends = {}, {}
    for entry in instance.all_logs(run.run_id):
        event = entry.dagster_event
        if event is None or not event.step_key:
            continue
        if event.event_type == dg.DagsterEventType.STEP_START:
            starts[event.step_key] = entry.timestamp
        elif event.event_type in (dg.DagsterEventType.STEP_SUCCESS, dg.DagsterEventType.STEP_FAILURE):
            ends[event.step_key] = entry.timestamp
    steps = [
        {"step": k, "wall_s": ends.get(k, s) - s, "start": s, "end": ends.get(k, s)}
        for k, s in sorted(starts.items(), key=lambda kv: kv[1])
    ]
    instance.dispose()
    return run.run_id, steps


def run_once(args: argparse.Namespace, copy: Path, env: dict, label: str) -> dict:
    load = load_average()
    before = cpu_children()
    started, started_at = time.monotonic(), time.time()
    out = subprocess.run(
        [sys.executable, "-m", "pipelines", "cycle", "--config", str(copy), "--class", args.product_class],
        cwd=args.tree,
        env=env,
        capture_output=True,
        text=True,
    )
    wall, ended_at = time.monotonic() - started, time.time()
    orphans = reap_orphans()
    cpu = cpu_children() - before
    if out.returncode not in (0,):
        sys.stderr.write(out.stdout[-4000:] + out.stderr[-4000:])
    run_id, steps = step_times(Path(env["DAGSTER_HOME"]))
    return {
        "run": label,
        "exit_code": out.returncode,
        "wall_s": wall,
        "cpu_s": cpu,
        "orphans_reaped": orphans,
        "run_id": run_id,
        "steps_s": sum(s["wall_s"] for s in steps),
        # outside the steps, in three parts: before the first step starts (imports, instance, run creation),
        # between the steps (Dagster's own work from one step's end to the next one's start), after the last
        "before_first_step_s": steps[0]["start"] - started_at if steps else wall,
        "between_steps_s": sum(b["start"] - a["end"] for a, b in zip(steps, steps[1:], strict=False)),
        "after_last_step_s": ended_at - steps[-1]["end"] if steps else 0.0,
        "steps": steps,
        "load_before": load,
        "load_after": load_average(),
    }


def profile_in_process(args: argparse.Namespace, copy: Path, env: dict, stats_path: Path) -> dict:
    """One more cycle in this process under cProfile; the 25 functions of most cumulative time."""
    os.environ["DAGSTER_HOME"] = env["DAGSTER_HOME"]
    os.chdir(ROOT)
    load = load_average()
    profiler = cProfile.Profile(time.process_time) if args.timer == "cpu" else cProfile.Profile()
    started, cpu0 = time.monotonic(), time.process_time()
    profiler.enable()
    from pipelines.__main__ import main

    code = main(["cycle", "--config", str(copy), "--class", args.product_class])
    profiler.disable()
    wall, cpu = time.monotonic() - started, time.process_time() - cpu0
    profiler.dump_stats(stats_path)
    text = io.StringIO()
    pstats.Stats(profiler, stream=text).sort_stats("cumulative").print_stats(25)
    return {
        "exit_code": code,
        "wall_s": wall,
        "cpu_s": cpu,
        "stats_file": str(stats_path),
        "top": text.getvalue(),
        "load_before": load,
        "load_after": load_average(),
    }


def _load(d: dict) -> str:
    return f"load {d['load_1m']:.2f} {d['load_5m']:.2f} {d['load_15m']:.2f}"


def report(result: dict) -> None:
    imp = result["imports"]
    print(
        f"imports: {imp['total_s']:.2f} s in-child ({imp['command_s']:.2f} command, "
        f"{imp['definitions_s']:.2f} definitions), child wall {imp['wall_s']:.2f} s, cpu {imp['cpu_s']:.2f} s; "
        f"heavy modules loaded: {', '.join(imp['heavy_loaded'])}; {_load(imp['load_before'])}"
    )
    for run in result["runs"]:
        print(
            f"\n{run['run']} run (exit {run['exit_code']}): wall {run['wall_s']:.2f} s, cpu {run['cpu_s']:.2f} s, "
            f"steps {run['steps_s']:.2f} s, outside the steps {run['wall_s'] - run['steps_s']:.2f} s "
            f"(before the first {run['before_first_step_s']:.2f}, between {run['between_steps_s']:.2f}, "
            f"after the last {run['after_last_step_s']:.2f}); {_load(run['load_before'])} -> {_load(run['load_after'])}"
        )
        for step in run["steps"]:
            print(f"  {step['step']:<28} {step['wall_s']:7.2f} s")
    if "profile" in result:
        prof = result["profile"]
        print(
            f"\nprofiled warm run in-process: wall {prof['wall_s']:.2f} s, cpu {prof['cpu_s']:.2f} s "
            f"(cProfile's overhead included), {_load(prof['load_before'])}"
        )
        print(prof["top"])


def parse_args(argv: list[str] | None = None) -> argparse.Namespace:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--class", dest="product_class", default="consumables")
    parser.add_argument(
        "--config", help="default: the --tree's config/planning.weekly.yaml (an older tree may not know a newer key)"
    )
    parser.add_argument(
        "--tree", default=str(ROOT), help="the source tree whose command line runs (another commit's, for a pair)"
    )
    parser.add_argument("--work", default="/tmp/small-class")
    parser.add_argument("--runs", type=int, default=2, help="the first cold, the rest warm (default 2)")
    parser.add_argument("--profile", action="store_true", help="one more warm run in this process under cProfile")
    parser.add_argument(
        "--timer",
        choices=("wall", "cpu"),
        default="wall",
        help="the profile's clock: wall, or this process's cpu (without its pool workers')",
    )
    parser.add_argument("--json", help="results JSON (default benchmarks/results/small-class-<class>.json)")
    args = parser.parse_args(argv)
    args.config = args.config or str(Path(args.tree) / "config" / "planning.weekly.yaml")
    return args


def main(argv: list[str] | None = None) -> int:
    args = parse_args(argv)
    copy, env = prepare(args)
    result = {"class": args.product_class, "config": args.config, "tree": args.tree, "runs": []}
    # the children inherit these: with PYTHONDONTWRITEBYTECODE set, the tree's own modules are compiled from
    # source at every start (no __pycache__ written): about 0.1 s of cpu a run on this project, not a user's cost
    result["env"] = {k: os.environ.get(k) for k in ("PYTHONDONTWRITEBYTECODE", "PYTHONPYCACHEPREFIX")}
    result["cpu_counts_orphans"] = adopt_orphans()  # the pool's forkserver and workers in each run's cpu
    result["imports"] = time_imports(args, copy, env)
    for i in range(args.runs):
        result["runs"].append(run_once(args, copy, env, "cold" if i == 0 else "warm"))
    target = Path(args.json or ROOT / "benchmarks" / "results" / f"small-class-{args.product_class}.json")
    if args.profile:
        result["profile"] = profile_in_process(args, copy, env, Path(args.work) / "profile.prof")
    from benchmarks.cycle_measure import versions

    result["versions"] = versions()
    report(result)
    target.parent.mkdir(parents=True, exist_ok=True)
    target.write_text(json.dumps(result, indent=1, default=str) + "\n")
    print(f"\nwrote {target}")
    return 0 if all(r["exit_code"] == 0 for r in result["runs"]) else 1


if __name__ == "__main__":
    sys.exit(main())
