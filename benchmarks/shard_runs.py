"""Wall time of one class's shards run K at a time: `python -m pipelines cycle --class C --parallel K`.

    .venv/bin/python benchmarks/shard_runs.py [--class consumables] [--shards 4] [--parallel 1 2] [--whole]

For each K the demo cycle of class C, cut into `--shards` shards, runs in a
fresh store and Dagster instance (a temporary folder), as a planner runs it:
the command line, each shard a run of its own in a process of its own when
K > 1. The config is config/planning.weekly.yaml over data/demo with what a
sharded class may not leave to the backtest fixed (`FIXED`: strategy, window,
method, seasonality; no levels above the parent; pipelines/shards.py).
`--whole` also times the class as one partition under the same config;
`--no-cut` reads the whole history in every partition (`scale.cut_inputs:
false`, as before the history was cut once per cycle). Prints
the wall time of each run, its ratio to K = 1, and the load average (`uptime`)
before and after: on a shared machine the figures move with the load.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import yaml

ROOT = Path(__file__).resolve().parents[1]
# what a class cut into shards must fix (pipelines.shards.check_scale); the demo's own values where it fixes them
FIXED = {
    "consumables": {"seasonality": "none"},
    "seasonal": {"window": 52, "method": "pooled", "strategy": "top_down", "seasonality": "none"},
    "spares": {"strategy": "mint_shrink", "seasonality": "none"},
}


def config_file(folder: Path, product_class: str, shards: int, cut: bool = True) -> Path:
    data = yaml.safe_load((ROOT / "config" / "planning.weekly.yaml").read_text())
    data["inputs"]["folder"] = str(ROOT / "data" / "demo")
    data["store"]["path"] = str(folder / "store")
    data["hierarchy"] = {"upper_levels": []}
    for name, keys in FIXED.items():
        data["product_classes"][name].update(keys)
    data["product_classes"][product_class]["scale"] = {"shards": shards}
    data["scale"] = {"cut_inputs": cut}
    path = folder / "planning.yaml"
    path.write_text(yaml.safe_dump(data, sort_keys=False))
    return path


def load() -> str:
    return os.getloadavg().__repr__()


def timed_run(product_class: str, shards: int, parallel: int, cut: bool = True) -> tuple[float, int, str, str]:
    """(seconds, exit code, load before, load after) of one cycle of the class in a fresh store and instance."""
    with tempfile.TemporaryDirectory(prefix="shard-runs-") as tmp:
        folder = Path(tmp)
        path = config_file(folder, product_class, shards, cut)
        (folder / "dagster").mkdir()
        env = {**os.environ, "DAGSTER_HOME": str(folder / "dagster"), "PYTHONPATH": str(ROOT)}
        command = [sys.executable, "-m", "pipelines", "cycle", "--config", str(path), "--class", product_class,
                   "--parallel", str(parallel)]
        before = load()
        started = time.monotonic()
        done = subprocess.run(command, cwd=ROOT, env=env, capture_output=True, text=True)
        seconds = time.monotonic() - started
        if done.returncode not in (0, 1):  # 1: a WARN-level or blocking check failed, the runs still timed
            print(done.stdout[-2000:], done.stderr[-2000:], file=sys.stderr)
        after = load()
        print(f"  steps summed over the runs: {input_steps(env)}")
        return seconds, done.returncode, before, after


INPUT_STEPS = ("raw_history", "cleaned_history")  # the steps the history cut changes (pipelines/input_cut.py)


def input_steps(env: dict) -> str:
    """The seconds of the steps the history cut changes, summed over the cycle's runs (read from the instance)."""
    script = (
        "import dagster as dg; i = dg.DagsterInstance.get(); t = {}\n"
        "for r in i.get_runs():\n"
        "    for s in i.get_run_step_stats(r.run_id):\n"
        "        if s.step_key in %r and s.end_time: t[s.step_key] = t.get(s.step_key, 0) + s.end_time - s.start_time\n"
        "print(', '.join(f'{k} {v:.1f} s' for k, v in sorted(t.items())))" % (INPUT_STEPS,)
    )
    done = subprocess.run([sys.executable, "-c", script], env=env, capture_output=True, text=True)
    return done.stdout.strip() or done.stderr.strip()[-300:]


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--class", dest="product_class", default="consumables")
    parser.add_argument("--shards", type=int, default=4)
    parser.add_argument("--parallel", type=int, nargs="+", default=[1, 2])
    parser.add_argument("--whole", action="store_true", help="also time the class as one partition")
    parser.add_argument("--no-cut", action="store_true",
                        help="scale.cut_inputs: false, every partition reads the whole history (as before the cut)")
    args = parser.parse_args(argv)
    print(f"class {args.product_class}, {os.cpu_count()} cores; load average (1, 5, 15 min) before and after")
    runs = [(1, 1)] if args.whole else []
    runs += [(args.shards, k) for k in args.parallel]
    first = None
    for shards, k in runs:
        seconds, code, before, after = timed_run(args.product_class, shards, k, not args.no_cut)
        base = first if first is not None and shards > 1 else None
        if shards > 1 and first is None:
            first = seconds
        ratio = f", {seconds / base:.2f} x K={args.parallel[0]}" if base else ""
        print(f"shards {shards}, --parallel {k}: {seconds:7.1f} s (exit {code}){ratio}; load {before} -> {after}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
