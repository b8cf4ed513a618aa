"""The cycle benchmark on slices of parents: a large scenario run one slice at a time, each in a process of its own.

    python benchmarks/cycle_slices.py --leaves 1000000 --slices 10 --json benchmarks/results/cycle-1m-slices.json

A scenario of `--leaves` leaf series is made of `--slices` independent slices
of leaves/slices each (the generator's seed + slice number: its own products,
sites and parents), and each slice goes through `benchmarks/cycle.py` in a
process of its own, one after another. This is how the tool holds a class
larger than one machine's memory: a class cut into shards (`scale: {shards:
N}`) runs a shard at a time, every shard's parents apart (DEVELOPERS.md,
*Shards*), so memory follows the slice, not the total. What the figures are:

- wall, own code, statsforecast and validation seconds: the slices' sums
  (each slice's own `total`), and the generator's time beside them (not in
  the total, as in `cycle.py`);
- peak RSS: the largest slice's (a slice's process ends before the next
  starts);
- the model stage and the side-by-side ratios: over the slices' summed
  seconds.

Not the same as one draw of `--leaves` series: the slices do not share
products or customers, so no parent spans two slices (as no parent spans two
shards).
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from cycle_measure import load_average as load  # noqa: E402
from cycle_measure import versions  # noqa: E402

SUMMED = ("wall_s", "statsforecast_s", "own_code_s", "validation_s")


def run_slice(leaves: int, seed: int, extra: list[str], folder: Path) -> dict:
    """One slice through `benchmarks/cycle.py` in a process of its own; its JSON figures."""
    out = folder / f"slice-{seed}.json"
    command = [sys.executable, str(HERE / "cycle.py"), "--leaves", str(leaves), "--seed", str(seed),
               "--trace", "off", "--json", str(out), *extra]
    subprocess.run(command, check=True, stdout=subprocess.DEVNULL)
    return json.loads(out.read_text())


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
        "per_slice": [{"seed": s["parameters"]["seed"], **{k: s["total"][k] for k in (*SUMMED, "rss_peak_mb")}}
                      for s in slices],
    }
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
    p.add_argument("--json", default=None, metavar="PATH", help="write the figures as JSON")
    args, extra = p.parse_known_args(argv)
    slices = args.slices or max(1, round(args.leaves / 100_000))
    size = args.leaves // slices
    started, at_start, found = time.monotonic(), load(), []
    with tempfile.TemporaryDirectory() as folder:
        for i in range(slices):
            found.append(run_slice(size, args.seed + i, extra, Path(folder)))
            t = found[-1]["total"]
            print(f"slice {i + 1}/{slices} (seed {args.seed + i}, {size:,} leaves): wall {t['wall_s']:.1f} s, own "
                  f"{t['own_code_s']:.1f} s, statsforecast {t['statsforecast_s']:.1f} s, validation "
                  f"{t['validation_s']:.1f} s, peak {t['rss_peak_mb'] / 1024:.2f} GB", flush=True)
    result = combine(found, size * slices)
    result["elapsed_s"] = time.monotonic() - started
    result["load"] = {"start": at_start, "end": load()}
    result["versions"] = versions()
    t, m = result["total"], result["model_stage"]
    print(f"{size * slices:,} leaves in {slices} slices: total {t['wall_s']:.1f} s (own {t['own_code_s']:.1f}, "
          f"statsforecast {t['statsforecast_s']:.1f}, validation {t['validation_s']:.1f} = "
          f"{100 * t['validation_share_of_own']:.1f} % of own), peak RSS {t['rss_peak_mb'] / 1024:.2f} GB; model "
          f"stage {m['model_stage_over_statsforecast']:.2f}x statsforecast")
    if "side_by_side" in result:
        s = result["side_by_side"]
        print(f"side by side: stages {s['stages_over_duckdb']:.1f}x DuckDB, {s['stages_over_numpy']:.1f}x numpy")
    if args.json:
        Path(args.json).write_text(json.dumps(result, indent=2))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
