"""The cycle benchmark on slices of parents: a large scenario run one slice at a time, each in a process of its own.

    python benchmarks/cycle_slices.py --leaves 1000000 --slices 10 [--parallel K] [--n-jobs N]
        --json benchmarks/results/cycle-1m-slices.json

A scenario of `--leaves` leaf series is made of `--slices` independent slices
of leaves/slices each (the generator's seed + slice number: its own products,
sites and parents), and each slice goes through `benchmarks/cycle.py` in a
process of its own, `--parallel K` at a time (default 1: one after another).
This is how the tool holds a class larger than one machine's memory: a class
cut into shards (`scale: {shards: N}`) runs its shards K at a time
(`python -m pipelines cycle --parallel K`), every shard's parents apart
(DEVELOPERS.md, *Shards*), so memory follows K slices, not the total. Each
slice's statsforecast gets `--n-jobs` processes (default: cores // K, at
least 1). What the figures are:

- `elapsed_s`: the wall time of the whole run, first slice started to last
  slice ended (the scenario's making or reading inside, as each slice makes
  its own): what "the whole cycle" takes on this machine. The plain versions
  of the side by side run in the first `--side-by-side N` slices only
  (default 1), after their cycle: they are a yardstick, not part of the cycle;
- wall, own code, statsforecast and validation seconds (`total`): the
  slices' sums (each slice's own `total`, the generator not in it, as in
  `cycle.py`): work, not elapsed time, once K > 1; the generator's summed
  time beside them;
- peak memory: `peak_sum_rss_mb`, the largest sum of the RSS of the slices'
  process trees (each slice's process and its statsforecast workers)
  sampled at the same moment every 0.2 s (`benchmarks/process_memory.py`;
  pages two processes share count twice), `peak_sum_pss_mb` the same in PSS
  (shared pages counted once), and `peak_bound_mb`, the sum of the K largest
  slices' own peaks (`rss_peak_mb`), a bound the sampled sum stays under
  unless the workers add more; `total.rss_peak_mb` stays the largest
  slice's own peak;
- `process_s` per slice: its process's start to exit, and `outside_total_s`
  what of that is not in its `total` (interpreter start and imports, the
  scenario's read, the warm-up, the previous shares, the side by side, the
  exit); `steps_summed`: every step's seconds summed over the slices;
- the model stage ratio: over the slices' summed seconds; the side-by-side
  ratios: over the summed seconds of the slices that ran it.

Not the same as one draw of `--leaves` series: the slices do not share
products or customers, so no parent spans two slices (as no parent spans two
shards).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from cycle_measure import load_average as load  # noqa: E402
from cycle_measure import versions  # noqa: E402
from process_memory import TreeSampler  # noqa: E402

SUMMED = ("wall_s", "statsforecast_s", "own_code_s", "validation_s")


def start_slice(leaves: int, seed: int, extra: list[str], folder: Path) -> tuple[subprocess.Popen, Path]:
    """One slice through `benchmarks/cycle.py` in a process of its own, started; the process and its JSON's path."""
    out = folder / f"slice-{seed}.json"
    command = [sys.executable, str(HERE / "cycle.py"), "--leaves", str(leaves), "--seed", str(seed),
               "--trace", "off", "--json", str(out), *extra]
    return subprocess.Popen(command, stdout=subprocess.DEVNULL), out


def run_slices(
    size: int, seeds: list[int], parallel: int, extra: list[str], sampler: TreeSampler, side_by_side: int
) -> list[dict]:
    """Every slice, `parallel` at a time; their JSON figures in the order of `seeds`. The first `side_by_side`
    slices also run the plain DuckDB and numpy versions after their cycle (outside their total)."""
    found: dict[int, dict] = {}
    waiting, running, started = list(seeds), {}, {}
    with tempfile.TemporaryDirectory() as folder:
        while waiting or running:
            while waiting and len(running) < parallel:
                seed = waiting.pop(0)
                plain = [] if seeds.index(seed) < side_by_side else ["--no-side-by-side"]
                process, out = start_slice(size, seed, [*extra, *plain], Path(folder))
                sampler.watch(str(seed), process.pid)
                running[seed], started[seed] = (process, out), time.monotonic()
            time.sleep(0.2)
            for seed, (process, out) in list(running.items()):
                if process.poll() is None:
                    continue
                sampler.forget(str(seed))
                del running[seed]
                if process.returncode != 0:
                    for other, _ in running.values():
                        other.terminate()
                    raise SystemExit(f"slice of seed {seed} failed (exit {process.returncode})")
                found[seed] = json.loads(out.read_text())
                found[seed]["process_s"] = time.monotonic() - started[seed]
                t = found[seed]["total"]
                print(f"slice {len(found)}/{len(seeds)} done (seed {seed}, {size:,} leaves): wall {t['wall_s']:.1f} s, "
                      f"own {t['own_code_s']:.1f} s, statsforecast {t['statsforecast_s']:.1f} s, validation "
                      f"{t['validation_s']:.1f} s, peak {t['rss_peak_mb'] / 1024:.2f} GB; process "
                      f"{found[seed]['process_s']:.1f} s start to exit", flush=True)
    return [found[s] for s in seeds]


def memory(slices: list[dict], parallel: int, sampler: TreeSampler) -> dict:
    """The peaks of the slices running together (see the module docstring)."""
    peaks = sorted((s["total"]["rss_peak_mb"] for s in slices), reverse=True)
    return {"peak_sum_rss_mb": sampler.peak_sum_mb("rss"), "peak_sum_pss_mb": sampler.peak_sum_mb("pss"),
            "peak_bound_mb": sum(peaks[:parallel]), "most_slices_at_once": sampler.most_at_once(),
            "sample_s": 0.2}


def steps_summed(slices: list[dict]) -> dict:
    """Each step's wall and statsforecast seconds summed over the slices (the steps outside a slice's total too:
    the scenario's read, the warm-up, the previous shares), so where a slice's process time goes is in one table."""
    out: dict[str, dict] = {}
    for s in slices:
        for st in s["steps"]:
            row = out.setdefault(st["stage"].strip(), {"wall_s": 0.0, "sf_s": 0.0})
            row["wall_s"] += st["wall_s"]
            row["sf_s"] += st.get("sf_s") or 0.0
    return out


def combine(slices: list[dict], leaves: int) -> dict:
    """The whole scenario's figures from its slices' (see the module docstring)."""
    total = {k: sum(s["total"][k] for s in slices) for k in SUMMED}
    total["validation_share_of_own"] = total["validation_s"] / total["own_code_s"]
    total["rss_peak_mb"] = max(s["total"]["rss_peak_mb"] for s in slices)
    generate = sum(st["wall_s"] for s in slices for st in s["steps"] if st["stage"].startswith("generate"))
    stage = sum(s["model_stage"]["model_stage_s"] for s in slices)
    sf = sum(s["model_stage"]["statsforecast_s"] for s in slices)
    side = [s["side_by_side"] for s in slices if s.get("side_by_side")]
    out = {
        "leaves": leaves,
        "slices": len(slices),
        "parents": sum(s["scenario"]["parents"] for s in slices),
        "lines": sum(s["scenario"]["lines"] for s in slices),
        "total": total,
        "generate_s_not_in_total": generate,
        "model_stage": {"model_stage_s": stage, "statsforecast_s": sf, "model_stage_over_statsforecast": stage / sf},
        "per_slice": [{"seed": s["parameters"]["seed"], **{k: s["total"][k] for k in (*SUMMED, "rss_peak_mb")},
                       "process_s": s["process_s"], "outside_total_s": s["process_s"] - s["total"]["wall_s"]}
                      for s in slices],
        "steps_summed": steps_summed(slices),
    }
    total["process_s"] = sum(s["process_s"] for s in slices)
    if side:
        stages, duck, numpy = (sum(s[k] for s in side) for k in ("stages_s", "duckdb_s", "numpy_s"))
        out["side_by_side"] = {"stages_s": stages, "duckdb_s": duck, "numpy_s": numpy,
                               "stages_over_duckdb": stages / duck, "stages_over_numpy": stages / numpy}
    return out


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--leaves", type=int, required=True, help="leaf series in all (default slices of 100,000)")
    p.add_argument("--slices", type=int, default=None, help="slices (default: leaves / 100,000, at least 1)")
    p.add_argument("--seed", type=int, default=7, help="the first slice's seed; slice i takes seed + i")
    p.add_argument("--parallel", type=int, default=1, metavar="K", help="slices running at once (default 1)")
    p.add_argument("--n-jobs", type=int, default=None,
                   help="statsforecast processes per slice (cycle.py --n-jobs; default cores // K, at least 1)")
    p.add_argument("--side-by-side", type=int, default=1, metavar="N",
                   help="slices that also run the plain DuckDB and numpy versions (default 1: the ratio is per slice, "
                        "and the versions' minutes are not part of the cycle's elapsed time)")
    p.add_argument("--json", default=None, metavar="PATH", help="write the figures as JSON")
    args, extra = p.parse_known_args(argv)
    if args.parallel < 1:
        p.error("--parallel >= 1")
    slices = args.slices or max(1, round(args.leaves / 100_000))
    size = args.leaves // slices
    n_jobs = args.n_jobs if args.n_jobs is not None else max(1, (os.cpu_count() or 1) // args.parallel)
    print(f"{size * slices:,} leaves in {slices} slices of {size:,}, {args.parallel} at a time, statsforecast n_jobs "
          f"{n_jobs} per slice, {os.cpu_count()} cores", flush=True)
    started, at_start, sampler = time.monotonic(), load(), TreeSampler(0.2)
    try:
        found = run_slices(size, [args.seed + i for i in range(slices)], args.parallel,
                           [*extra, "--n-jobs", str(n_jobs)], sampler, args.side_by_side)
    finally:
        sampler.stop()
    result = combine(found, size * slices)
    result["elapsed_s"] = time.monotonic() - started
    result["parallel"], result["n_jobs"], result["side_by_side_slices"] = args.parallel, n_jobs, args.side_by_side
    result["memory"] = memory(found, args.parallel, sampler)
    result["load"] = {"start": at_start, "end": load()}
    result["versions"] = versions()
    t, m, mem = result["total"], result["model_stage"], result["memory"]
    print(f"{size * slices:,} leaves in {slices} slices, {args.parallel} at a time: elapsed "
          f"{result['elapsed_s']:.1f} s (generation inside); summed over the slices: wall {t['wall_s']:.1f} s "
          f"(own {t['own_code_s']:.1f}, "
          f"statsforecast {t['statsforecast_s']:.1f}, validation {t['validation_s']:.1f} = "
          f"{100 * t['validation_share_of_own']:.1f} % of own), generation {result['generate_s_not_in_total']:.1f} s; "
          f"model stage {m['model_stage_over_statsforecast']:.2f}x statsforecast")
    gb = (lambda v: "?" if v is None else f"{v / 1024:.2f}")  # noqa: E731
    print(f"peak memory of the slices running together: sampled sum RSS {gb(mem['peak_sum_rss_mb'])} GB, PSS "
          f"{gb(mem['peak_sum_pss_mb'])} GB (every 0.2 s, at most {mem['most_slices_at_once']} at once); bound (the "
          f"{args.parallel} largest slice peaks) {gb(mem['peak_bound_mb'])} GB; largest slice "
          f"{gb(t['rss_peak_mb'])} GB")
    if "side_by_side" in result:
        s = result["side_by_side"]
        print(f"side by side: stages {s['stages_over_duckdb']:.1f}x DuckDB, {s['stages_over_numpy']:.1f}x numpy")
    if args.json:
        Path(args.json).write_text(json.dumps(result, indent=2))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
