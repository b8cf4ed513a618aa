"""The cycle report's charts on a stored cycle, repeated: CPU seconds of the report stage per class and in all.

    python benchmarks/report_charts.py --store PATH [--repeat 3] [--out DIR] [--json FILE]

The store is one written by `benchmarks/cycle.py --stages ...,report --store PATH` (any `--leaves`). Each class's
rows are picked as that benchmark's report step picks them (outside the clock); the clock is
`time.process_time()` around `pipelines.stages.cycle_report.run`, the stage as its asset calls it (both charts,
drawn and encoded). CPU time, not wall time: the machine is shared. For an A/B, run it alternately on two
checkouts (`PYTHONPATH=<checkout>`, main, branch, main, branch) and compare the medians; the load average before
and after is printed. `--out` writes the PNG files to look at.
"""

from __future__ import annotations

import argparse
import json
import statistics
import sys
import time
from pathlib import Path

from class_slices import class_slices
from cycle_measure import git_commit, load_average

import pipelines
from pipelines.stages import cycle_report
from pipelines.store import read_table

TABLES = ("lifecycle_history", "parent_forecast", "reinitialized_target", "share_tables", "cycle_calendar")


def main(argv: list[str] | None = None) -> dict:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--store", required=True)
    p.add_argument("--repeat", type=int, default=3)
    p.add_argument("--out", default=None, help="folder for the PNG files (default: not written)")
    p.add_argument("--json", default=None)
    args = p.parse_args(argv)
    tables = {name: read_table(args.store, name, versions="latest") for name in TABLES}
    calendar = tables["cycle_calendar"]
    cycle = f"{calendar['cycle_date'].iloc[0]:%Y-%m-%d}"
    period = str(calendar["period"].iloc[0])
    shares = tables["share_tables"]
    classes = sorted(shares["product_class"].unique())
    mine = dict(class_slices(tables, shares, classes))  # as benchmarks/cycle.py's run_report gets a class's rows
    out = Path(args.out) if args.out else Path(".")
    load = {"start": load_average()}
    runs, sizes = [], {}
    for _ in range(args.repeat):
        seconds = {}
        for c in classes:
            settings = cycle_report.ReportSettings(period, c, cycle, out)
            start = time.process_time()
            result = cycle_report.run(**mine[c], settings=settings)
            seconds[c] = time.process_time() - start
            for name, png in result.files.items():
                sizes[name] = len(png)
                if args.out:
                    out.mkdir(parents=True, exist_ok=True)
                    (out / name).write_bytes(png)
        runs.append(seconds)
        print("  ".join(f"{c} {s:.2f}" for c, s in seconds.items()), f"  all {sum(seconds.values()):.2f} s cpu")
    load["end"] = load_average()
    totals = [sum(r.values()) for r in runs]
    rows = len(tables["lifecycle_history"])
    print(f"report of {len(classes)} classes on {rows:,} history rows: median {statistics.median(totals):.2f} s cpu, "
          f"min {min(totals):.2f} (code {Path(pipelines.__file__).parent.parent})")
    print(f"PNG bytes: {sum(sizes.values()):,} in {len(sizes)} files; load {load['start']['load_1m']:.1f} -> "
          f"{load['end']['load_1m']:.1f}")
    figures = {"store": args.store, "runs": runs, "median_s": statistics.median(totals), "min_s": min(totals),
               "png_bytes": sizes, "history_rows": rows, "load": load, "commit": git_commit(),
               "code": str(Path(pipelines.__file__).parent.parent)}
    if args.json:
        Path(args.json).write_text(json.dumps(figures, indent=1))
    return figures


if __name__ == "__main__":
    sys.exit(main() and 0)
