"""The demo's backtest per class: WMAPE, MASE, RMSSE (where the backtest reports it) and interval coverage.

Runs every stage of one demo partition per class with the backtest (as the
check-mutation suite does, `tests/stage_runs.run_partition`) and prints, per
class, the strategy and seasonality the cycle follows and, at leaf and parent
grain, the chosen pair's figures beside seasonal naive. Works on any checkout
(metrics it does not have print as n/a), so a clone of an older main gives the
"before" figures:

    .venv/bin/python benchmarks/backtest_table.py [--out table.csv]
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import pandas as pd

ROOT = Path(__file__).resolve().parents[1]
sys.path[:0] = [str(ROOT), str(ROOT / "tests")]

from stage_runs import demo_config, run_partition  # noqa: E402

METRICS = ("wmape", "mase", "rmsse", "coverage_80", "coverage_95")


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--out", type=Path, default=None)
    parser.add_argument("--classes", default="consumables,seasonal,spares")
    args = parser.parse_args()
    config = demo_config()
    rows = []
    for name in args.classes.split(","):
        started = time.perf_counter()
        run = run_partition(config, "2026-11-30", name, backtest=True)
        acc, choice = run.tables["backtest_accuracy"], run.tables["strategy_choice"]
        chosen = choice.iloc[0]
        season = chosen.get("seasonality", "")
        if "seasonality" in acc.columns:
            acc = acc[acc["seasonality"] == season]
        for grain in ("leaf", "parent"):
            for strategy in (chosen["strategy"], "seasonal_naive"):
                mine = acc[(acc["grain"] == grain) & (acc["strategy"] == strategy)].set_index("metric")["value"]
                row = {"class": name, "seasonality": season or "n/a", "strategy": strategy, "grain": grain}
                row.update({m: mine.get(m, float("nan")) for m in METRICS})
                rows.append(row)
        print(f"{name}: {time.perf_counter() - started:.0f} s", file=sys.stderr)
        full = run.tables["backtest_accuracy"]
        if "seasonality" in full.columns:
            wm = full[(full["metric"] == "wmape")].pivot_table(
                index=["grain", "strategy"], columns="seasonality", values="value"
            )
            print(f"{name}: WMAPE by seasonality\n{wm.round(4)}", file=sys.stderr)
    table = pd.DataFrame(rows)
    with pd.option_context("display.width", 200, "display.max_columns", 20):
        print(table.round(4).to_string(index=False))
    if args.out:
        table.to_csv(args.out, index=False)


if __name__ == "__main__":
    main()
