"""Time and size every stage of the weekly cycle on a synthetic hierarchy.

    .venv/bin/python benchmarks/cycle.py --leaves 10000 [--seed 7] [--periods 156] [--horizon 26]
        [--stages raw,clean,lifecycle,shares,basis,target,backtest,choice,forecast,reconcile,plan,drift,report]
        [--seasonal] [--leaf-grain CLASS] [--share-method pooled|mean_of_ratios|smoothed|seasonal|children_forecast]
        [--shortage-rule exclude|fill_baseline] [--no-shortages] [--csv]
        [--store [PATH]] [--no-validate] [--trace rerun|inline|off] [--no-warmup] [--scenario-cache [DIR]]
        [--rss-sample-ms MS] [--json PATH]

A seeded generator builds N leaf series (product x site x customer, 5-15
customers per product x site, three product classes) with `--periods` weeks of
history: smooth and intermittent series, seasonal ones in one class, late
starters, phased-out customers, new customers with a reference customer,
retired products with a successor, outliers, split lines, returns (a few that
outweigh the week), exact duplicate lines, a few bad lines and recorded supply
shortages (passed to `clean_history`), and the planner input of the plan's
measures: a list price on every parent and week, promotion uplifts and
planner adjustments on a few percent of parent x weeks, a handful of pins. The
lines are
raw text, as `load_raw_history` delivers them (`--csv` writes them to CSV files
in a temporary folder and times the real loader on them).

Then the stages run through the very `run(...)` functions and settings the
assets call (`assets.factory.SPECS`, in the order of the asset graph), each
over every class at once, their rule checks inside the run; each output is
validated with its pandera model as the assets do (`validate ...` lines). The
share drift compares with a share table computed at the cycle date minus one
period (outside the total: the cycle reads it from the store); the report
step draws each class's charts on that class's rows, as the partitioned asset
gets them. The backtest (`backtest`) is left out unless named in `--stages`;
without it the strategy choice is empty, which is right for the benchmark's
classes (none is `auto`). `--share-method` sets every class's share method, so
the per-period methods' cost shows in the `basis` step (`children_forecast`
forecasts every established child there with statsforecast). Columns:

    wall s    wall time of the step (untraced run)
    sf s      of that, time inside StatsForecast.forecast (wrapped in this process only);
              one `sf <model>` line per statsforecast call follows the forecast step
    py peak   tracemalloc peak of the step's own allocations (above what it was given),
              from a second, traced run of the step in a forked child process
    py out    what that run allocated and still held at its end (its output)
    rss       process RSS after the step
    rss pk    process RSS peak during the step (sampled every --rss-sample-ms)
    rss max   getrusage ru_maxrss: the process high-water mark so far
    rows in / rows out

Memory is measured without distorting the times (`--trace rerun`, the
default): each step runs once untraced in this process (wall time, RSS) and
once more under tracemalloc in a forked child (Python heap peak, output size),
so neither tracemalloc's slowdown nor a second copy of the output lands in the
parent's times or RSS. In the forecast step's traced rerun,
`StatsForecast.forecast` replays the results of the timed run, so `py peak`
is that of our code; the memory statsforecast (numba) needs itself shows in
the `rss pk` (sampled) and `rss max` (getrusage) columns.

Numba compiles the statsforecast models on their first call; a warm-up on a
tiny frame runs before the cycle and is reported on its own line (outside the
total) unless `--no-warmup` is given.

tracemalloc slows allocation-heavy Python code (pandas string columns, pandera)
three to ten times, which is why it is not on during the timed run (`--trace
inline` does one traced run instead; `--trace off` none).
"""

from __future__ import annotations

import argparse
import gc
import json
import sys
import tempfile
import tracemalloc
from dataclasses import asdict
from pathlib import Path

import pandas as pd

ROOT = Path(__file__).resolve().parents[1]
for path in (ROOT, ROOT / "benchmarks"):
    if str(path) not in sys.path:
        sys.path.insert(0, str(path))

from class_slices import class_slices  # noqa: E402
from cycle_inputs import SHARE_METHODS, SMOOTHING, make_config  # noqa: E402
from cycle_measure import (  # noqa: E402
    HEADER,
    UNITS,
    Bench,
    git_commit,
    load_average,
    patch_statsforecast,
    total_line,
    versions,
    warm_up,
)
from cycle_scenario import CLASSES, Scenario  # noqa: E402
from scenario_cache import scenario_maker  # noqa: E402
from side_by_side import compare, patch_split  # noqa: E402

from assets.factory import Partition, graph_order  # noqa: E402
from pipelines import definitions  # noqa: E402, F401  (makes every stage asset, so SPECS holds them all)
from pipelines.calendar import shift_periods  # noqa: E402
from pipelines.engines.children import active_children  # noqa: E402
from pipelines.engines.history_files import load_raw_history  # noqa: E402
from pipelines.engines.shares import compute_shares  # noqa: E402
from pipelines.stages.cycle_report import ReportSettings  # noqa: E402
from pipelines.tables import MODELS  # noqa: E402
from pipelines.text_dtype import validate_table  # noqa: E402

# step name of each stage (by its first table), in graph order; `raw` is the loader or the generated lines
STEP = {
    "cleaned_history": "clean", "lifecycle_history": "lifecycle", "share_tables": "shares", "period_basis": "basis",
    "reinitialized_target": "target", "backtest_accuracy": "backtest", "strategy_choice": "choice",
    "statistical_forecast": "forecast", "reconciliation": "reconcile", "plan_measures": "plan", "share_drift": "drift",
    "cycle_report": "report",
}
STAGES = ("raw",) + tuple(STEP.values())
DEFAULT_STAGES = tuple(s for s in STAGES if s != "backtest")
MODEL_STEPS = {"basis", "backtest", "forecast"}  # steps that may call statsforecast


# =================================================================== the cycle
def run_cycle(args: argparse.Namespace) -> dict:
    stages = [s.strip() for s in args.stages.split(",") if s.strip()]
    unknown = sorted(set(stages) - set(STAGES))
    if unknown:
        raise SystemExit(f"--stages: unknown stage(s) {unknown}; choose from {list(STAGES)}")
    last = max(STAGES.index(s) for s in stages)  # earlier stages feed the last one, so they run too
    todo = [s for s in STAGES[: last + 1] if s != "backtest" or "backtest" in stages]

    args.load_at_start = load_average()
    if args.trace == "inline":
        tracemalloc.start()
    bench = Bench(trace=args.trace, sample_ms=args.rss_sample_ms)
    patch_statsforecast(bench)
    split = patch_split()  # the forecast stage's split, counted in the side by side
    config = make_config(args.periods, args.horizon, args.seasonal, args.leaf_grain, args.shortage_rule,
                         seasonal_model=args.seasonal_model, class_outliers=not args.default_outliers,
                         share_method=args.share_method, n_jobs=args.n_jobs)
    print(
        f"apportion cycle benchmark: {args.leaves:,} leaves, seed {args.seed}, {args.periods} weekly periods, horizon "
        f"{args.horizon}, seasonal={args.seasonal_model if args.seasonal else 'off'}, leaf "
        f"grain={args.leaf_grain or '-'}, "
        f"share method={args.share_method or 'per class'}, tracemalloc={args.trace}, commit {(git_commit() or '?')[:8]}"
    )
    print(HEADER)
    print(UNITS)
    print("-" * len(HEADER))

    tmp = tempfile.TemporaryDirectory(prefix="apportion-bench-")
    csv_folder = Path(tmp.name) / "inputs" if args.csv else None
    scen = bench.run(
        *scenario_maker(args, csv_folder),  # label, maker; --scenario-cache: Parquet files written once, then read
        rows_in=args.leaves,
        rows_out=lambda s: s.lines,
        in_total=False,
        trace=False,
        note=lambda s: f"{s.facts['parents']:,} parents, {s.facts['products']:,} products",
    )
    con = open_store(args, tmp)
    if not args.no_warmup and any(s in todo for s in MODEL_STEPS):
        bench.run("warm-up numba (not in total)", lambda: warm_up(config, args.horizon), in_total=False, trace=False)
        bench.sf_calls.clear()
        bench.sf_seconds = 0.0
    config.check_classes_known(set(scen.products["product_class"]), where="benchmark products")
    tables = inputs(bench, scen, args)
    # without the backtest step: no accuracy, so no choice (none of the benchmark's classes is `auto`)
    for name in ("backtest_accuracy", "backtest_losses", "share_tuning"):  # so the share tables follow the config
        tables[name] = pd.DataFrame({c: pd.Series(dtype=object) for c in MODELS[name].to_schema().columns})
    for name, frame in tables.items():
        store(bench, con, name, frame)
    part = Partition(config, config, "2026-11-30", CLASSES[0])  # every class at once; the report runs per class
    for spec in graph_order():
        step = STEP.get(spec.tables[0].name)  # None: an input asset (the generator gave its table)
        if step not in todo:
            continue
        frames = {name: tables[name] for name in spec.ins}
        if step == "drift":
            frames.update(previous_shares(bench, tables, config))
        if step == "report":
            results = [  # a class's rows picked outside the step's time, one class at a time
                run_report(bench, spec, mine, c, part, Path(tmp.name) / "reports")
                for c, mine in class_slices(frames, frames["share_tables"], config.product_classes)
            ]
        else:
            results = [run_stage(bench, step, spec, frames, spec.settings(part))]
        for table in spec.tables:
            frame = pd.concat([r.outputs[table.name] for r in results], ignore_index=True)
            tables[table.name] = validate(bench, args, table.name, frame)
            store(bench, con, table.name, tables[table.name])
    scen.facts["raw_lines"] = len(tables["raw_history"])
    compared = compare(bench.steps, args, tables, config, split) if "reconcile" in todo else {}
    out = finish(bench, args, scen, compared)
    tmp.cleanup()
    return out


def inputs(bench: Bench, scen: Scenario, args: argparse.Namespace) -> dict[str, pd.DataFrame]:
    """The generated inputs as the input assets deliver them (every class at once), validated."""
    if scen.folder is not None:
        raw = bench.run(
            "raw: load_raw_history", lambda: load_raw_history(scen.folder)[0], rows_out=len, note=lambda _: "CSV read"
        )
    else:
        raw = scen.raw
    scen.raw = None
    given = {
        "products": scen.products,
        "customer_spans": scen.spans,
        "raw_history": raw,
        "adjustments": scen.adjustments,
        "pins": scen.pins,
        "shortages": scen.shortages.iloc[0:0] if args.no_shortages else scen.shortages,
    }
    return {name: validate(bench, args, name, frame) for name, frame in given.items()}


def run_stage(bench: Bench, step: str, spec, frames: dict, settings):
    """The stage's own run, as its asset calls it, timed; its checks' failing rows in the note."""
    rows_in = sum(len(f) for f in frames.values() if isinstance(f, pd.DataFrame))
    first = spec.tables[0].name

    def note(result) -> str:
        failing = ", ".join(f"{name} {len(c.rows)}" for name, c in result.checks.items() if len(c.rows))
        return f"{len(result.checks)} checks, failing: {failing or 'none'}" if result.checks else ""

    return bench.run(f"{step}: {first}", lambda: spec.run(**frames, settings=settings), rows_in=rows_in,
                     rows_out=lambda r: len(r.outputs[first]), note=note, sf=step in MODEL_STEPS)


def run_report(bench: Bench, spec, mine: dict, product_class: str, part: Partition, folder: Path):
    """One class's charts on that class's rows (`class_slices.class_slices`, as the partitioned asset gets them)."""
    settings = ReportSettings(part.config.calendar.period, product_class, part.cycle, folder)
    result = run_stage(bench, f"report {product_class}", spec, mine, settings)
    folder.mkdir(parents=True, exist_ok=True)
    for name, data in result.files.items():
        (folder / name).write_bytes(data)
    return result


def previous_shares(bench: Bench, tables: dict, config) -> dict:
    """The share table at the cycle date minus one period: what the cycle reads from the store (not in the total)."""
    history, spans, products = tables["lifecycle_history"], tables["customer_spans"], tables["products"]
    cycle_date = pd.Timestamp(tables["cycle_calendar"]["cycle_date"].iloc[0])
    before = shift_periods(cycle_date, -1, config.calendar.period)
    previous = bench.run(
        "  previous shares (not in total)",
        lambda: compute_shares(history, active_children(spans, products, history, config, before), config, before),
        rows_in=len(history), rows_out=len, in_total=False, trace=False, note=lambda _: f"cycle {before:%Y-%m-%d}",
    )
    return {"previous": previous, "previous_cycle": f"{before:%Y-%m-%d}"}


def validate(bench: Bench, args: argparse.Namespace, name: str, frame: pd.DataFrame) -> pd.DataFrame:
    if args.no_validate:
        return frame
    model = MODELS[name]
    return bench.run(
        f"  validate {name}",
        lambda: validate_table(model, frame),
        rows_in=len(frame),
        note=lambda _: model.__name__,
    )


def open_store(args: argparse.Namespace, tmp):
    if args.store is None:
        return None
    from pipelines.store import open_store as open_folder

    return open_folder(Path(args.store) if args.store else Path(tmp.name) / "store")


def store(bench: Bench, con, table: str, frame: pd.DataFrame) -> None:
    if con is None:
        return

    def write():  # as the IO manager (resources.PartitionStore) does it: a new Parquet version of the partition
        con.write(table, "2026-11-30", "bench", frame, run_id="bench")

    bench.run(f"  store {table}", write, rows_in=len(frame), trace=False)


def finish(bench: Bench, args: argparse.Namespace, scen: Scenario, compared: dict) -> dict:
    line, total = total_line(bench.steps)
    print("-" * len(HEADER))
    print(line)
    print("scenario: " + ", ".join(f"{k} {v:,}" for k, v in scen.facts.items()))
    load = {"start": args.load_at_start, "end": load_average()}
    print("load average (1 / 5 / 15 min), start and end: " + "; ".join(
        f"{v['load_1m']:.2f} / {v['load_5m']:.2f} / {v['load_15m']:.2f} at {v['at']}" for v in load.values()))
    result = {
        "parameters": {k: v for k, v in vars(args).items() if k != "load_at_start"},
        "scenario": scen.facts,
        "steps": [asdict(s) for s in bench.steps],
        "statsforecast_calls": [asdict(c) for c in bench.sf_calls],
        "total": total,
        "load": load,
        **compared,
        "versions": versions(),
    }
    if args.json:
        Path(args.json).parent.mkdir(parents=True, exist_ok=True)
        Path(args.json).write_text(json.dumps(result, indent=2, default=str))
        print(f"wrote {args.json}")
    return result


def parse_args(argv: list[str] | None = None) -> argparse.Namespace:
    p = argparse.ArgumentParser(prog="benchmarks/cycle.py", description=__doc__.splitlines()[0])
    p.add_argument("--leaves", type=int, required=True, help="number of leaf series (product x site x customer)")
    p.add_argument("--seed", type=int, default=7, help="generator seed (default 7)")
    p.add_argument("--periods", type=int, default=156, help="weeks of history (default 156)")
    p.add_argument("--horizon", type=int, default=26, help="weeks to forecast (default 26)")
    p.add_argument(
        "--stages",
        default=",".join(DEFAULT_STAGES),
        help=f"comma list from {','.join(STAGES)}; the cycle runs up to the last one named (backtest only when named)",
    )
    p.add_argument("--seasonal", action="store_true", help="seasonal ETS / seasonal naive on class 'seasonal'")
    p.add_argument(
        "--seasonal-model",
        default="auto_ets",
        help="smooth/erratic model of class 'seasonal' with --seasonal "
        "(default auto_ets; the shipped config uses ets_additive_season)",
    )
    p.add_argument(
        "--default-outliers",
        action="store_true",
        help="one Hampel rule for every class instead of the shipped per-class rules",
    )
    p.add_argument(
        "--leaf-grain", choices=CLASSES, default=None, help="forecast this class at product x site x customer grain"
    )
    p.add_argument(
        "--share-method",
        choices=SHARE_METHODS,
        default=None,
        help=(
            f"share method of every class (smoothed with smoothing {SMOOTHING}); default: pooled, "
            "mean_of_ratios, pooled per class"
        ),
    )
    p.add_argument(
        "--shortage-rule",
        choices=("exclude", "fill_baseline"),
        default="exclude",
        help="cleansing.shortages (default exclude)",
    )
    p.add_argument("--no-shortages", action="store_true", help="an empty shortages table instead of the synthetic one")
    p.add_argument("--csv", action="store_true", help="write the lines to CSV files and time load_raw_history on them")
    p.add_argument(
        "--store",
        nargs="?",
        const="",
        default=None,
        metavar="PATH",
        help="also time the store's write of each table (a Parquet version; temp folder unless PATH)",
    )
    p.add_argument("--scenario-cache", nargs="?", const="var/bench-scenarios", default=None, metavar="DIR",
                   help="the scenario as Parquet files in DIR (var/bench-scenarios): written once, then read")
    p.add_argument("--no-validate", action="store_true", help="skip the pandera validations")
    p.add_argument(
        "--trace",
        choices=("rerun", "inline", "off"),
        default="rerun",
        help="rerun (default): time each step untraced, then run it again under tracemalloc for its heap peak; "
        "inline: one traced run (wall times inflated by tracemalloc); off: no tracemalloc",
    )
    p.add_argument(
        "--no-warmup", action="store_true", help="no numba warm-up: JIT compile time lands in the forecast stage"
    )
    p.add_argument(
        "--rss-sample-ms",
        type=float,
        default=10.0,
        help="RSS sampling interval for the 'rss pk' column; 0 = off (default 10)",
    )
    p.add_argument("--n-jobs", type=int, default=-1, help="models.n_jobs: statsforecast processes (-1 = every core)")
    p.add_argument("--no-side-by-side", action="store_true", help="skip the plain DuckDB and numpy versions")
    p.add_argument("--json", default=None, metavar="PATH", help="write the figures as JSON")
    args = p.parse_args(argv)
    if args.leaves < 1 or args.periods < 8 or args.horizon < 1:
        p.error("--leaves >= 1, --periods >= 8 and --horizon >= 1")
    return args


def main(argv: list[str] | None = None) -> None:
    run_cycle(parse_args(argv))
    # the interpreter's exit without its last collections over what the cycle left, as `python -m pipelines` ends
    # (pipelines/__main__.py, end_process): about 1 s of a 100k slice's elapsed time, outside its total. Freezing
    # after the imports too (so the ~40 collections before steps skip them) was measured and dropped: RSS 0.4-2 GB
    # higher through the cycle and slower stages (benchmarks/README.md, *The slices' time outside their totals*)
    gc.freeze()


if __name__ == "__main__":
    main()
