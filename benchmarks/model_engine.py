"""Time the model runs on each engine: this process, statsforecast's pool, a Dask cluster of 1 and 2 workers.

    nice -n 10 .venv/bin/python benchmarks/model_engine.py --leaves 100000 [--runs dask2,dask1,local1,...]
        [--repeat 2] [--periods 156] [--horizon 26] [--json PATH]

The series are the parents of a `--leaves` hierarchy as `benchmarks/cycle.py`
builds it (5-15 customers per product x site, 10 on average, so 10,000
parent series at 100,000 leaves; `--series N` sets the count directly),
`--periods` weeks each, seeded smooth demand with a level, a trend and noise,
every one fitted with non-seasonal AutoETS (the default model of smooth and
erratic series), horizon `--horizon`: what the model step of
`statistical_forecast` runs for a top-down class. Runs (each in this process;
the clock covers the call only):

- `direct1`, `direct2`: statsforecast alone, `StatsForecast.forecast` on the
  same long frame with `n_jobs` 1 and 2;
- `local1`, `local2`: `pipelines.engines.models.run_model_groups` (grid ->
  frame, fit/predict, ETS parameters, fitted values), config `models.n_jobs`
  1 and 2 (`engine: local`);
- `dask1`, `dask2`: the same call with `engine: dask` on a `LocalCluster` of 1
  and 2 worker processes (one thread each), started and warmed up (one small
  AutoETS chunk per worker) before the clock; its start time is printed apart.

Printed: wall time per run, the CPU seconds it used (this process and its
pool's processes; for Dask runs the workers' too, asked of each worker), the
load average (`os.getloadavg`) before and after it, and the ratios dask1 / dask2 (the issue's "2 workers >= 1.7x
faster than 1"), local2 / direct2 and local1 / direct1 (the engine over
statsforecast alone). Every engine run's forecasts are compared with the
first run's: they must be equal to the last bit (the script stops
otherwise); statsforecast's `forecast` (direct) may differ from its
`fit`/`predict` (the engine's ETS path) in the last bits, the largest
difference is printed.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from statsforecast import StatsForecast  # noqa: E402
from statsforecast import models as sfm  # noqa: E402

from pipelines.engines import model_engine  # noqa: E402
from pipelines.engines.model_engine import EngineSettings, close_clusters  # noqa: E402
from pipelines.engines.models import run_model_groups  # noqa: E402
from pipelines.engines.series_grids import SeriesGrid  # noqa: E402

RUNS = ("dask2", "dask1", "local1", "local2", "direct1", "direct2")


def parent_grid(n_series: int, periods: int, seed: int) -> SeriesGrid:
    """Seeded smooth weekly series: level 20-200, a trend of up to +-0.3 % a week, gamma noise (CV 0.25-0.5)."""
    rng = np.random.default_rng(seed)
    level = rng.uniform(20, 200, n_series)[:, None]
    trend = 1 + rng.uniform(-0.003, 0.003, n_series)[:, None] * np.arange(periods)
    shape = 1 / rng.uniform(0.25, 0.5, n_series) ** 2
    mean = level * trend
    y = rng.gamma(shape[:, None], mean / shape[:, None])
    y[:, 0] = np.maximum(y[:, 0], 1.0)  # every series starts with demand, so the grid keeps all periods
    series = np.repeat(np.arange(n_series), periods)
    ordinal = np.tile(np.arange(periods), n_series)
    return SeriesGrid(series=series, ordinal=ordinal, y=y.ravel(), n_series=n_series)


def load() -> float:
    return os.getloadavg()[0]


def _cpu_seconds() -> float:
    t = os.times()
    return t.user + t.system + t.children_user + t.children_system


def cpu_now(run: str) -> float:
    """CPU seconds used so far by this process and its finished children, plus the cluster's workers (dask runs)."""
    total = _cpu_seconds()
    if run.startswith("dask"):
        client = model_engine.cluster_client(None, int(run[-1]))
        total += sum(client.run(_cpu_seconds).values())
    return total


def timed(run: str, grid: SeriesGrid, horizon: int) -> tuple[float, np.ndarray]:
    names = np.full(grid.n_series, "auto_ets", dtype=object)
    season = np.ones(grid.n_series, dtype=int)
    if run.startswith("direct"):
        frame = pd.DataFrame({"unique_id": grid.series, "ds": grid.ordinal, "y": grid.y})
        sf = StatsForecast(models=[sfm.AutoETS(season_length=1)], freq=1, n_jobs=int(run[-1]),
                           fallback_model=sfm.Naive())
        started = time.perf_counter()
        out = sf.forecast(df=frame, h=horizon)
        return time.perf_counter() - started, out["AutoETS"].to_numpy(float).reshape(-1, horizon)
    if run.startswith("local"):
        engine = EngineSettings(n_jobs=int(run[-1]))
    else:
        engine = EngineSettings(engine="dask", workers=int(run[-1]))
    started = time.perf_counter()
    res = run_model_groups(grid, names, season, horizon, engine=engine)
    return time.perf_counter() - started, res.forecast


def start_cluster(workers: int, periods: int, horizon: int) -> float:
    """Start the engine's LocalCluster of `workers` and compile/warm every worker; seconds taken."""
    close_clusters()
    started = time.perf_counter()
    small = parent_grid(2 * workers, periods, 0)
    engine = EngineSettings(engine="dask", workers=workers)
    saved, model_engine.CHUNK_SERIES = model_engine.CHUNK_SERIES, 1
    try:
        for _ in range(2):  # every worker gets a chunk at least once
            run_model_groups(small, np.full(small.n_series, "auto_ets", dtype=object),
                             np.ones(small.n_series, dtype=int), horizon, engine=engine)
    finally:
        model_engine.CHUNK_SERIES = saved
    return time.perf_counter() - started


def main(argv=None) -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--leaves", type=int, default=100_000)
    p.add_argument("--series", type=int, default=None, help="parent series (default leaves / 10)")
    p.add_argument("--periods", type=int, default=156)
    p.add_argument("--horizon", type=int, default=26)
    p.add_argument("--seed", type=int, default=7)
    p.add_argument("--runs", default=",".join(RUNS))
    p.add_argument("--repeat", type=int, default=1)
    p.add_argument("--json", type=Path)
    args = p.parse_args(argv)
    n = args.series or args.leaves // 10
    grid = parent_grid(n, args.periods, args.seed)
    # warm statsforecast in this process (its first call pays for imports and compilation)
    timed("local1", parent_grid(4, args.periods, 0), args.horizon)
    print(f"{n:,} series x {args.periods} periods, AutoETS non-seasonal, horizon {args.horizon}; "
          f"{os.cpu_count()} cores; chunk {model_engine.CHUNK_SERIES} series", flush=True)
    results: list[dict] = []
    reference = None
    for rep in range(args.repeat):
        for run in args.runs.split(","):
            start_s = None
            if run.startswith("dask"):
                start_s = start_cluster(int(run[-1]), args.periods, args.horizon)
            before, cpu_before = load(), cpu_now(run)
            seconds, fc = timed(run, grid, args.horizon)
            after, cpu = load(), cpu_now(run) - cpu_before
            if run.startswith("dask"):
                close_clusters()
            if reference is None:
                reference = fc
            differ = float(np.max(np.abs(fc - reference)))
            if differ and not run.startswith("direct"):
                raise SystemExit(f"{run}: forecasts differ from the first run's (by up to {differ:g})")
            row = {"repeat": rep + 1, "run": run, "seconds": round(seconds, 2), "cpu_s": round(cpu, 2),
                   "load_before": round(before, 2),
                   "load_after": round(after, 2), "max_abs_difference": differ,
                   "cluster_start_s": None if start_s is None else round(start_s, 1)}
            results.append(row)
            extra = f"  (cluster start + warm-up {start_s:.1f} s, not counted)" if start_s is not None else ""
            extra += f"  (differs from the engine's by up to {differ:.3g})" if differ else ""
            print(f"  {rep + 1} {run:<8} {seconds:8.2f} s  cpu {cpu:8.2f} s  load {before:5.2f} -> {after:5.2f}{extra}",
                  flush=True)
    ratios = summary(results)
    if args.json:
        args.json.write_text(json.dumps({"series": n, "periods": args.periods, "horizon": args.horizon,
                                         "cores": os.cpu_count(), "runs": results, "ratios": ratios}, indent=1))


def summary(results: list[dict]) -> dict:
    """Median seconds per run and the ratios of the issue; printed."""
    med = {r: float(np.median([x["seconds"] for x in results if x["run"] == r])) for r in {x["run"] for x in results}}
    ratios = {}
    for name, (a, b) in {"dask1 / dask2 (speed-up of 2 workers)": ("dask1", "dask2"),
                         "local1 / local2 (speed-up of n_jobs 2)": ("local1", "local2"),
                         "local1 / direct1 (engine over statsforecast alone)": ("local1", "direct1"),
                         "local2 / direct2 (engine over statsforecast alone)": ("local2", "direct2"),
                         "dask1 / local1 (1 Dask worker over this process)": ("dask1", "local1")}.items():
        if a in med and b in med:
            ratios[name] = round(med[a] / med[b], 3)
            print(f"{name}: {med[a]:.2f} / {med[b]:.2f} s = {ratios[name]:.2f}x")
    return ratios


if __name__ == "__main__":
    main()
