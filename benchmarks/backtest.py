"""Time the backtest and the forecast rerun per strategy on a synthetic hierarchy of N leaves.

    python benchmarks/backtest.py --leaves 10000 [--weeks 156] [--origins 3] [--horizon 13] [--models fast|demo]

The hierarchy: parents (product x site) with 2-18 customers each (10 on
average), three product classes (a third each): `steady` (smooth, some with
trend), `seasonal` (a yearly swing) and `sporadic` (intermittent). Generated
in one vectorised pass from np.random.default_rng(seed).

`--models fast` (default) uses cheap models so 100,000 leaves finish in
minutes: SES for smooth/erratic, seasonal naive for the seasonal class, Croston
SBA / TSB for intermittent/lumpy. `--models demo` uses the demo's models
(AutoETS, ETS(A,N,A)), roughly 100x slower per series.

Reported: wall time of the backtest and of the cycle's forecast for each
strategy, and the share of it inside statsforecast (every `StatsForecast.fit`,
`predict` and `forecast` call is wrapped with a timer here, in the benchmark
only) versus our own code (grids, demand classes, shares, reconciliation,
accuracy).

Measured on the 2-core project machine (shared, so wall times are upper
bounds), 156 weeks, 3 origins x 13 weeks:

| leaves | models | backtest s (in library) | cycle forecast s per strategy: top_down / fp / bottom_up / mint / wls |
| --- | --- | --- | --- |
| 1,000 | demo | 38.6 (98%) | 1.2 / 9.7 / 9.1 / 12.6 / 12.9 |
| 10,000 | fast | 12.7 (40%) | 2.0 / 2.9 / 2.8 / 5.1 / 4.5 |
| 100,000 | fast | 220.6 (42%) | 20.5 / 41.4 / 38.6 / 43.0 / 26.0 |

With the demo's models nearly all the time is statsforecast's (AutoETS about
25 ms, ETS(A,N,A) about 50 ms a series here); with cheap models our own code
dominates, mostly string-key lookups (pandas MultiIndex) and the share table
recomputed at each origin.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from statsforecast import StatsForecast  # noqa: E402

from pipelines.config import parse_config  # noqa: E402
from pipelines.engines.shares import compute_shares  # noqa: E402
from pipelines.stages.backtest_accuracy import run_backtest  # noqa: E402
from pipelines.stages.reinitialized_target import reinitialize_target  # noqa: E402
from pipelines.stages.statistical_forecast import forecast_cycle  # noqa: E402

STRATEGIES = ["top_down", "forecast_proportions", "bottom_up", "mint_shrink", "wls_var"]
CLASSES = ["steady", "seasonal", "sporadic"]
MODELS = {
    "fast": {
        "steady": {"smooth": "ses", "erratic": "ses", "intermittent": "croston_sba", "lumpy": "croston_sba"},
        "seasonal": {
            "smooth": "seasonal_naive",
            "erratic": "seasonal_naive",
            "intermittent": "croston_sba",
            "lumpy": "croston_sba",
            "seasonal": True,
        },
        "sporadic": {"smooth": "ses", "erratic": "ses", "intermittent": "tsb", "lumpy": "croston_sba"},
    },
    "demo": {
        "steady": {"smooth": "auto_ets", "erratic": "auto_ets", "intermittent": "croston_sba", "lumpy": "croston_sba"},
        "seasonal": {
            "smooth": "ets_additive_season",
            "erratic": "ets_additive_season",
            "intermittent": "croston_sba",
            "lumpy": "croston_sba",
            "seasonal": True,
        },
        "sporadic": {"smooth": "ses", "erratic": "ses", "intermittent": "croston_sba", "lumpy": "croston_sba"},
    },
}


class LibraryTimer:
    """Accumulates the time spent inside StatsForecast.fit / predict / forecast."""

    def __init__(self):
        self.seconds = 0.0
        self._originals = {}

    def __enter__(self):
        for name in ("fit", "predict", "forecast"):
            original = getattr(StatsForecast, name)
            self._originals[name] = original

            def timed(*args, __original=original, **kwargs):
                started = time.perf_counter()
                try:
                    return __original(*args, **kwargs)
                finally:
                    self.seconds += time.perf_counter() - started

            setattr(StatsForecast, name, timed)
        return self

    def __exit__(self, *exc):
        for name, original in self._originals.items():
            setattr(StatsForecast, name, original)


def synthetic(n_leaves: int, weeks: int, seed: int):
    """History, children, cycle date: a vectorised draw of n_leaves customer series."""
    rng = np.random.default_rng(seed)
    sizes = []
    total = 0
    while total < n_leaves:  # a few thousand draws at most: sizes of parents, not series
        draw = rng.integers(2, 19, size=max(1, (n_leaves - total) // 10 + 1))
        sizes.append(draw)
        total += int(draw.sum())
    sizes = np.concatenate(sizes)
    cut = np.searchsorted(np.cumsum(sizes), n_leaves)
    sizes = sizes[: cut + 1]
    sizes[-1] -= int(sizes.sum()) - n_leaves
    n_parents = len(sizes)
    parent = np.repeat(np.arange(n_parents), sizes)
    rank = np.arange(n_leaves) - np.repeat(np.cumsum(sizes) - sizes, sizes)
    pclass = rng.integers(0, 3, n_parents)
    cls = pclass[parent]
    t = np.arange(weeks)
    level = rng.gamma(2.0, 10.0, n_leaves)[:, None]
    trend = rng.normal(0, 0.004, n_leaves)[:, None]
    season = np.where(cls == 1, 0.8, 0.1)[:, None] * np.sin(
        2 * np.pi * (t[None, :] + rng.integers(0, 52, n_leaves)[:, None]) / 52
    )
    mean = level * np.exp(trend * t[None, :]) * np.clip(1 + season, 0.05, None)
    demand = rng.random((n_leaves, weeks)) < np.where(cls == 2, 0.25, 0.97)[:, None]
    y = rng.poisson(mean * np.where(cls == 2, 3.0, 1.0)[:, None]) * demand
    leaf, week = np.nonzero(y)
    products = pd.Categorical.from_codes(parent[leaf], [f"P{i:06d}" for i in range(n_parents)])
    customers = pd.Categorical.from_codes(rank[leaf], [f"C{i:02d}" for i in range(int(sizes.max()))])
    starts = pd.date_range("2023-01-02", periods=weeks, freq="7D")
    history = pd.DataFrame(
        {
            "product": products,
            "site": "S1",
            "customer": customers,
            "period_start": starts[week],
            "quantity": y[leaf, week].astype(float),
        }
    )
    history["origin"] = "own"
    children = pd.DataFrame(
        {
            "product": pd.Categorical.from_codes(parent, products.categories),
            "site": "S1",
            "customer": pd.Categorical.from_codes(rank, customers.categories),
            "product_class": np.array(CLASSES)[cls],
        }
    )
    for frame in (history, children):
        frame["product"] = frame["product"].astype(str)
        frame["customer"] = frame["customer"].astype(str)
    return history, children, starts[-1] + pd.Timedelta(days=7), n_parents


def config(models: str, origins: int, horizon: int, grain: str = "auto"):
    classes = {
        name: {"window": 26, "fallback_windows": [52], "forecast_grain": grain, "models": MODELS[models][name]}
        for name in CLASSES
    }
    return parse_config(
        {
            "product_classes": classes,
            "calendar": {"horizon": 26},
            "backtest": {"origins": origins, "horizon": horizon, "step": horizon},
        }
    )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--leaves", type=int, default=10_000)
    parser.add_argument("--weeks", type=int, default=156)
    parser.add_argument("--origins", type=int, default=3)
    parser.add_argument("--horizon", type=int, default=13)
    parser.add_argument("--models", choices=sorted(MODELS), default="fast")
    parser.add_argument("--seed", type=int, default=20261201)
    args = parser.parse_args()

    started = time.perf_counter()
    history, children, cycle, n_parents = synthetic(args.leaves, args.weeks, args.seed)
    print(f"{args.leaves:,} leaves, {n_parents:,} parents, {len(history):,} history rows, {args.weeks} weeks; "
          f"generated in {time.perf_counter() - started:.1f} s; models: {args.models}")
    cfg = config(args.models, args.origins, args.horizon)

    rows = []
    with LibraryTimer() as timer:
        started = time.perf_counter()
        result = run_backtest(history, children, cfg, cycle)
        wall = time.perf_counter() - started
    rows.append(("backtest (all strategies, %d origins)" % len(result.origins), wall, timer.seconds))
    leaf = result.accuracy[(result.accuracy["grain"] == "leaf") & (result.accuracy["metric"] == "wmape")]
    print(leaf.pivot_table(index="strategy", columns="product_class", values="value").round(3).to_string())

    shares = compute_shares(history, children, cfg, cycle)
    target = reinitialize_target(shares, history, cfg, cycle)
    for strategy in STRATEGIES:
        with LibraryTimer() as timer:
            started = time.perf_counter()
            forecast_cycle(history, children, target, cfg, cycle, chosen={c: strategy for c in CLASSES})
            wall = time.perf_counter() - started
        rows.append((f"cycle forecast, {strategy}", wall, timer.seconds))

    print(f"\n{'step':44s} {'wall s':>8s} {'statsforecast s':>16s} {'share in library':>17s} {'our code s':>11s}")
    for name, wall, lib in rows:
        print(f"{name:44s} {wall:8.1f} {lib:16.1f} {lib / wall:16.0%} {wall - lib:11.1f}")


if __name__ == "__main__":
    main()
