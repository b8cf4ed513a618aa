"""Share + reinitialize + split + reconcile in plain DuckDB SQL and in numpy, on the cycle's own tables.

`benchmarks/cycle.py` calls `compare(...)` after the cycle: the model stage
against the statsforecast time inside it, then `side_by_side(...)`, which
prints each version's time beside the stages' and their ratio. The stages
counted are shares, target and reconcile (each stage's wall time) and the
split: the forecast stage's call of `combine_strategies` (each parent's
forecast split to its children by the basis, or reconciled, by its class's
strategy), timed by a wrapper (`patch_split`). The rest of the forecast
stage's own part (frames for statsforecast, the series grids, the long
tables) is model bookkeeping, which the model-stage ratio measures. The
earlier definition, which counted the whole forecast stage without
statsforecast, is printed and written too (`stages_with_forecast_own_s` and
its ratios).
Both plain versions do the same minimal arithmetic, without the
stages' rules (lifecycle of new and ending children, fallback windows,
shortage periods, zero reasons, checks, audit tables):

- share: a child's quantity over the last `window` periods of its class
  divided by its parent's (product x site), pooled;
- reinitialize: the parent's mean per period over that window times the
  share, for every horizon period;
- split: each parent forecast period times the share;
- reconcile: the children's split summed back per parent and period against
  the parent forecast (the largest relative difference is printed: ~0).

They are the floor the stages' engines are measured against, not a
replacement for them. numpy's time is given twice: with the text keys coded
to integers inside the clock, and the arithmetic alone on keys already coded.
"""

from __future__ import annotations

import time

import duckdb
import numpy as np
import pandas as pd

LEAF = ["product", "site", "customer"]
PARENT = ["product", "site"]


def _classes(tables: dict) -> pd.DataFrame:
    return tables["products"][["product", "product_class"]].drop_duplicates("product")


def duckdb_version(tables: dict, windows: dict[str, int], horizon: int) -> tuple[float, float]:
    """Seconds and the largest relative reconciliation difference, all four steps in one DuckDB connection."""
    history = tables["lifecycle_history"][LEAF + ["period_start", "quantity"]]
    forecast = tables["parent_forecast"][PARENT + ["period_start", "forecast"]]
    cycle = pd.Timestamp(tables["cycle_calendar"]["cycle_date"].iloc[0])
    win = pd.DataFrame({"product_class": list(windows), "win_periods": list(windows.values())})
    classes = _classes(tables)
    start = time.perf_counter()
    con = duckdb.connect()
    for name, frame in (("history", history), ("forecast", forecast), ("classes", classes), ("win", win)):
        con.register(name, frame)
    con.execute(f"""
        create temp table shares as
        with w as (
            select h.product, h.site, h.customer, h.quantity, win.win_periods
            from history h join classes c using (product) join win using (product_class)
            where h.period_start >= timestamp '{cycle:%Y-%m-%d}' - to_days(7 * win.win_periods)
        ), child as (
            select product, site, customer, sum(quantity) q, any_value(win_periods) win_periods from w group by all
        ), parent as (select product, site, sum(q) pq from child group by all)
        select child.product, child.site, child.customer, child.win_periods,
               case when pq > 0 then q / pq else 0 end share, pq / child.win_periods baseline
        from child join parent using (product, site)
    """)
    con.execute(f"""
        create temp table target as
        select s.product, s.site, s.customer, p.period_start, s.share * s.baseline target
        from shares s, (select timestamp '{cycle:%Y-%m-%d}' + to_days(7 * i) period_start
                        from range({horizon}) t(i)) p
    """)
    con.execute("""
        create temp table split as
        select s.product, s.site, s.customer, f.period_start, f.forecast * s.share value
        from forecast f join shares s using (product, site)
    """)
    worst = con.execute("""
        select coalesce(max(abs(l.total - f.forecast) / greatest(abs(f.forecast), 1e-9)), 0)
        from forecast f join (select product, site, period_start, sum(value) total from split group by all) l
        using (product, site, period_start) where f.forecast > 0
    """).fetchone()[0]
    con.close()
    return time.perf_counter() - start, float(worst)


def numpy_version(tables: dict, windows: dict[str, int], horizon: int) -> tuple[float, float, float]:
    """Seconds with the key coding, seconds of the arithmetic alone, and the largest relative difference."""
    history, forecast = tables["lifecycle_history"], tables["parent_forecast"]
    cycle = pd.Timestamp(tables["cycle_calendar"]["cycle_date"].iloc[0])
    classes = _classes(tables).set_index("product")["product_class"]
    start = time.perf_counter()
    # coding: leaf and parent ids from the text keys (once; the stages would carry them)
    leaf_of_row, leaves = _codes(history, LEAF)
    parent_of_leaf, parents = _codes(leaves, PARENT)
    fc_parent = pd.MultiIndex.from_frame(parents).get_indexer(pd.MultiIndex.from_frame(forecast[PARENT]))
    window = leaves["product"].map(classes).map(windows).to_numpy(dtype=np.int64)
    age = ((cycle - history["period_start"]).dt.days.to_numpy() // 7).astype(np.int64)  # 1 = the last week
    quantity = history["quantity"].to_numpy(dtype=np.float64)
    fc_value = forecast["forecast"].to_numpy(dtype=np.float64)
    coded = time.perf_counter()
    worst = _arithmetic(leaf_of_row, parent_of_leaf, len(parents), window, age, quantity, fc_parent, fc_value, horizon)
    end = time.perf_counter()
    return end - start, end - coded, worst


def _arithmetic(leaf_of_row, parent_of_leaf, n_parents, window, age, quantity, fc_parent, fc_value, horizon) -> float:
    inside = age <= window[leaf_of_row]
    child = np.bincount(leaf_of_row[inside], weights=quantity[inside], minlength=len(window))
    parent = np.bincount(parent_of_leaf, weights=child, minlength=n_parents)
    with np.errstate(invalid="ignore", divide="ignore"):
        share = np.where(parent[parent_of_leaf] > 0, child / parent[parent_of_leaf], 0.0)
    baseline = parent[parent_of_leaf] / window
    target = np.repeat((share * baseline)[:, None], horizon, axis=1)  # leaves x horizon periods
    # split: every forecast row of a parent to its leaves (leaves sorted by parent, so each parent is a range)
    order = np.argsort(parent_of_leaf, kind="stable")
    first = np.searchsorted(parent_of_leaf[order], np.arange(n_parents))
    count = np.bincount(parent_of_leaf, minlength=n_parents)
    rows = np.repeat(np.arange(len(fc_parent)), count[fc_parent])
    offset = np.arange(len(rows)) - np.repeat(np.cumsum(count[fc_parent]) - count[fc_parent], count[fc_parent])
    leaf = order[first[fc_parent[rows]] + offset]
    value = fc_value[rows] * share[leaf]
    total = np.bincount(rows, weights=value, minlength=len(fc_parent))
    positive = fc_value > 0
    assert target.shape[1] == horizon
    return float(np.max(np.abs(total - fc_value)[positive] / fc_value[positive], initial=0.0))


def _codes(frame: pd.DataFrame, cols: list[str]) -> tuple[np.ndarray, pd.DataFrame]:
    codes = frame.groupby(cols, sort=False).ngroup().to_numpy(np.int64)
    first = pd.Series(codes).drop_duplicates().index.to_numpy()
    return codes, frame[cols].iloc[first].reset_index(drop=True)


class SplitClock:
    """Wall and CPU seconds inside the forecast stage's split (`combine_strategies`), summed over its calls."""

    def __init__(self) -> None:
        self.wall_s = self.cpu_s = 0.0
        self.calls = 0


def patch_split() -> SplitClock:
    """Wrap the forecast stage's split (`statistical_forecast.combine_strategies`: every parent's forecast split
    to its children by the basis, or reconciled, by its class's strategy) with a clock; returns the clock."""
    from pipelines.stages import statistical_forecast as stage

    clock = SplitClock()
    original = getattr(stage.combine_strategies, "_unclocked", stage.combine_strategies)

    def timed(*args, **kwargs):
        t0, c0 = time.perf_counter(), time.process_time()
        try:
            return original(*args, **kwargs)
        finally:
            clock.wall_s += time.perf_counter() - t0
            clock.cpu_s += time.process_time() - c0
            clock.calls += 1

    timed._unclocked = original
    stage.combine_strategies = timed
    return clock


def side_by_side(
    tables: dict,
    windows: dict[str, int],
    horizon: int,
    stage_seconds: float,
    stage_cpu: float | None = None,
    old: tuple[float, float | None] | None = None,
) -> dict:
    """Each version's seconds and the stages' / version ratio, printed and returned.

    stage_cpu: the stages' CPU seconds (this process, every thread); with it the versions' CPU seconds and the
    ratio of CPU are given too, which a loaded machine moves less than wall time. old: the stages' wall (and
    CPU) seconds by the earlier definition (the whole forecast stage without statsforecast in place of the
    split), given beside.
    """
    cpu0 = time.process_time()
    db_s, db_worst = duckdb_version(tables, windows, horizon)
    cpu1 = time.process_time()
    np_s, np_arith_s, np_worst = numpy_version(tables, windows, horizon)
    cpu2 = time.process_time()
    out = {
        "stages_s": stage_seconds,
        "duckdb_s": db_s,
        "numpy_s": np_s,
        "numpy_arithmetic_only_s": np_arith_s,
        "stages_over_duckdb": stage_seconds / db_s,
        "stages_over_numpy": stage_seconds / np_s,
        "largest_relative_difference": {"duckdb": db_worst, "numpy": np_worst},
    }
    if stage_cpu is not None:
        out.update(stages_cpu_s=stage_cpu, duckdb_cpu_s=cpu1 - cpu0, numpy_cpu_s=cpu2 - cpu1)
        out["stages_over_duckdb_cpu"] = stage_cpu / out["duckdb_cpu_s"]
        out["stages_over_numpy_cpu"] = stage_cpu / out["numpy_cpu_s"]
    if old is not None:
        out["stages_with_forecast_own_s"] = old[0]
        out["stages_with_forecast_own_over_duckdb"] = old[0] / db_s
        out["stages_with_forecast_own_over_numpy"] = old[0] / np_s
        if old[1] is not None and stage_cpu is not None:
            out["stages_with_forecast_own_cpu_s"] = old[1]
            out["stages_with_forecast_own_over_duckdb_cpu"] = old[1] / out["duckdb_cpu_s"]
            out["stages_with_forecast_own_over_numpy_cpu"] = old[1] / out["numpy_cpu_s"]
    print(
        f"side by side (share + reinitialize + split + reconcile): stages {stage_seconds:.2f} s, plain DuckDB SQL "
        f"{db_s:.2f} s ({out['stages_over_duckdb']:.1f}x), numpy {np_s:.2f} s ({out['stages_over_numpy']:.1f}x; "
        f"arithmetic alone on coded keys {np_arith_s:.3f} s); reconcile difference DuckDB {db_worst:.1e}, "
        f"numpy {np_worst:.1e}"
    )
    if stage_cpu is not None:
        print(f"  cpu: stages {stage_cpu:.2f} s, DuckDB {out['duckdb_cpu_s']:.2f} s "
              f"({out['stages_over_duckdb_cpu']:.1f}x), numpy {out['numpy_cpu_s']:.2f} s "
              f"({out['stages_over_numpy_cpu']:.1f}x)")
    if old is not None:
        print(f"  counting the whole forecast stage's own part in place of the split (the earlier definition): "
              f"stages {old[0]:.2f} s, {out['stages_with_forecast_own_over_duckdb']:.1f}x DuckDB, "
              f"{out['stages_with_forecast_own_over_numpy']:.1f}x numpy")
    return out


def compare(steps: list, args, tables: dict, config, split: SplitClock | None = None) -> dict:
    """The model stage against statsforecast inside it, and the share-to-reconcile stages against plain versions.

    split: the clock `patch_split` put on the forecast stage's split before the cycle ran; without it the whole
    forecast stage without statsforecast is counted (the earlier definition) and no other figure is given."""
    wall = {s.stage.strip(): s for s in steps if s.in_total}
    forecast = wall["forecast: statistical_forecast"]
    out = {"model_stage_s": forecast.wall_s, "statsforecast_s": forecast.sf_s or 0.0, "n_jobs": args.n_jobs}
    out["model_stage_over_statsforecast"] = forecast.wall_s / out["statsforecast_s"] if forecast.sf_s else None
    print(f"model stage {forecast.wall_s:.2f} s, of which statsforecast {out['statsforecast_s']:.2f} s: "
          f"{out['model_stage_over_statsforecast'] or float('nan'):.2f}x (n_jobs {args.n_jobs})")
    if args.no_side_by_side:
        return {"model_stage": out}
    # the stages' share of the work: shares, target, the split inside the forecast stage and reconcile
    names = ("shares: share_tables", "target: reinitialized_target", "reconcile: reconciliation")
    own = sum(wall[n].wall_s for n in names)
    with_forecast_own = own + forecast.wall_s - out["statsforecast_s"]
    windows = {name: pc.window for name, pc in config.product_classes.items()}
    if split is None:
        return {"model_stage": out, "side_by_side": side_by_side(tables, windows, args.horizon, with_forecast_own)}
    print(f"split inside the forecast stage (combine_strategies, {split.calls} call): {split.wall_s:.2f} s")
    compared = side_by_side(tables, windows, args.horizon, own + split.wall_s, old=(with_forecast_own, None))
    compared.update(split_s=split.wall_s, stage_walls={n.split(": ")[1]: wall[n].wall_s for n in names})
    return {"model_stage": out, "side_by_side": compared}


# ---------------------------------------------------------------- from a stored cycle, repeated
STORED_STEPS = ("shares", "basis", "target", "choice", "forecast", "reconcile")
COUNTED = {"shares", "target", "reconcile"}  # + the split inside the forecast stage, as `compare` counts


def from_store(argv: list[str] | None = None) -> dict:
    """The stages from `share_tables` to `reconciliation` on a stored cycle's tables, `--repeat` times, each run
    beside the plain versions; the medians printed and written (`--json`).

    The store is one written by `benchmarks/cycle.py --stages reconcile --store PATH` with the same `--leaves`,
    `--periods` and `--horizon`; the stages run through their assets' own `run` and settings, as there.
    """
    import argparse
    import json
    import statistics
    import sys
    from pathlib import Path

    root = Path(__file__).resolve().parents[1]
    for path in (root, root / "benchmarks"):
        if str(path) not in sys.path:
            sys.path.insert(0, str(path))
    from cycle_inputs import make_config
    from cycle_measure import Bench, git_commit, load_average, patch_statsforecast, warm_up

    from assets.factory import Partition, graph_order
    from pipelines import definitions  # noqa: F401  (makes every stage asset)
    from pipelines.store import read_table

    p = argparse.ArgumentParser(description=from_store.__doc__)
    p.add_argument("--store", required=True)
    p.add_argument("--periods", type=int, default=156)
    p.add_argument("--horizon", type=int, default=26)
    p.add_argument("--repeat", type=int, default=3)
    p.add_argument("--n-jobs", type=int, default=-1)
    p.add_argument("--json", default=None)
    args = p.parse_args(argv)
    config = make_config(args.periods, args.horizon, False, None, "exclude", n_jobs=args.n_jobs)
    load = {"start": load_average()}
    bench = Bench(trace="off", sample_ms=0)
    patch_statsforecast(bench)
    warm_up(config, args.horizon)
    names = {"cleaned_history": None, "share_tables": "shares", "period_basis": "basis",
             "reinitialized_target": "target", "strategy_choice": "choice", "statistical_forecast": "forecast",
             "reconciliation": "reconcile"}
    specs = [s for s in graph_order() if names.get(s.tables[0].name)]
    stored = {}
    for spec in specs:
        for name in spec.ins:
            if name not in stored and name not in {t.name for s in specs for t in s.tables}:
                stored[name] = read_table(args.store, name, versions="latest")
    ids_s = None
    try:  # a release before the ids has no add_ids: its stages code the text keys themselves
        from pipelines.keys import add_ids
    except ImportError:
        add_ids = None
    if add_ids and "leaf_id" not in stored["lifecycle_history"].columns:  # a store written before the ids
        t0 = time.perf_counter()
        add_ids(stored["lifecycle_history"])
        ids_s = time.perf_counter() - t0
        print(f"leaf and parent ids added to lifecycle_history (the lifecycle stage's part, not counted): "
              f"{ids_s:.2f} s", flush=True)
    part = Partition(config, config, "2026-11-30", "fast")
    windows = {name: pc.window for name, pc in config.product_classes.items()}
    sf_cpu = _cpu_inside_statsforecast()
    split = patch_split()
    runs = []
    for i in range(args.repeat):
        tables = dict(stored)
        seconds = cpu = old_seconds = old_cpu = 0.0
        for spec in specs:
            step = names[spec.tables[0].name]
            frames = {name: tables[name] for name in spec.ins}
            sf_before, sf_cpu_before = bench.sf_seconds, sf_cpu[0]
            split_before, split_cpu_before = split.wall_s, split.cpu_s
            t0, c0 = time.perf_counter(), time.process_time()
            result = spec.run(**frames, settings=spec.settings(part))
            wall, used = time.perf_counter() - t0, time.process_time() - c0
            if step in COUNTED:
                seconds, cpu = seconds + wall, cpu + used
            if step in COUNTED or step == "forecast":
                old_seconds += wall - (bench.sf_seconds - sf_before)
                old_cpu += used - (sf_cpu[0] - sf_cpu_before)
            if step == "forecast":
                seconds += split.wall_s - split_before
                cpu += split.cpu_s - split_cpu_before
            print(f"run {i + 1}: {step} {wall:.2f} s, cpu {used:.2f} s (statsforecast "
                  f"{bench.sf_seconds - sf_before:.2f} s, cpu {sf_cpu[0] - sf_cpu_before:.2f} s; split "
                  f"{split.wall_s - split_before:.2f} s)", flush=True)
            tables.update(result.outputs)
        runs.append(side_by_side(tables, windows, args.horizon, seconds, cpu, old=(old_seconds, old_cpu)))
    load["end"] = load_average()
    keys = ("stages_s", "duckdb_s", "numpy_s", "numpy_arithmetic_only_s", "stages_over_duckdb", "stages_over_numpy",
            "stages_cpu_s", "duckdb_cpu_s", "numpy_cpu_s", "stages_over_duckdb_cpu", "stages_over_numpy_cpu",
            "stages_with_forecast_own_s", "stages_with_forecast_own_over_duckdb", "stages_with_forecast_own_over_numpy")
    median = {k: statistics.median(r[k] for r in runs) for k in keys}
    print("median of {} runs: stages {stages_s:.2f} s, DuckDB {duckdb_s:.2f} s ({stages_over_duckdb:.2f}x), numpy "
          "{numpy_s:.2f} s ({stages_over_numpy:.2f}x; arithmetic alone {numpy_arithmetic_only_s:.3f} s)"
          .format(len(runs), **median))
    print("median cpu: stages {stages_cpu_s:.2f} s, DuckDB {duckdb_cpu_s:.2f} s ({stages_over_duckdb_cpu:.2f}x), numpy "
          "{numpy_cpu_s:.2f} s ({stages_over_numpy_cpu:.2f}x)".format(**median))
    print("median by the earlier definition (the whole forecast stage's own part in place of the split): stages "
          "{stages_with_forecast_own_s:.2f} s ({stages_with_forecast_own_over_duckdb:.2f}x DuckDB, "
          "{stages_with_forecast_own_over_numpy:.2f}x numpy)".format(**median))
    print("load average (1 / 5 / 15 min), start and end: " + "; ".join(
        f"{v['load_1m']:.2f} / {v['load_5m']:.2f} / {v['load_15m']:.2f}" for v in load.values()))
    out = {"store": args.store, "runs": runs, "median": median, "load": load, "commit": git_commit(),
           "rows": {"lifecycle_history": len(stored["lifecycle_history"])}, "ids_added_s": ids_s}
    if args.json:
        Path(args.json).write_text(json.dumps(out, indent=2, default=str))
    return out


def _cpu_inside_statsforecast() -> list[float]:
    """A one-item list that accumulates this process's CPU seconds inside StatsForecast's calls (wrapped here)."""
    import statsforecast

    total = [0.0]
    for method in ("fit", "predict", "forecast"):
        original = getattr(statsforecast.StatsForecast, method)

        def timed(self, *args, _original=original, **kwargs):
            c0 = time.process_time()
            try:
                return _original(self, *args, **kwargs)
            finally:
                total[0] += time.process_time() - c0

        setattr(statsforecast.StatsForecast, method, timed)
    return total


if __name__ == "__main__":
    from_store()
