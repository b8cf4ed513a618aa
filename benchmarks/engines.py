"""Time the forecast-choice and hierarchy engines of issues 12 and 13 on realistic sizes.

    nice -n 10 .venv/bin/python benchmarks/engines.py [--series 100000] [--weeks 156] [--horizon 26]
        [--parents 100000] [--leaves-per-parent 10] [--regions 50] [--only NAME,...] [--json PATH]

Each case builds its inputs from np.random.default_rng(seed) (not timed), then
runs the engine once untraced (wall time) and once more under tracemalloc
(`py peak`: the largest heap the call allocated above what it was handed;
numpy's buffers are traced). `rss max` is the process high-water mark after
the case (it includes the inputs). Cases:

- `scaled_errors`: MASE and RMSSE of `--series` series with `--weeks` weeks of
  in-sample history and a `--horizon` test block, volume weights, pooled RMSSE
  over 20 classes (`pipelines.engines.scaled_errors`).
- `class_loss`: per-period class loss differential of two strategies for
  `--series` series over 6 origins x `--horizon` steps, 20 classes.
- `dm_test`: 10,000 DM-HLN tests of 6 x `--horizon` periods, h = `--horizon`.
- `group_seasonality`: multiplicative group indices of `--series` members in
  1,000 groups, then deseasonalise the history and reseasonalise a horizon.
- `seasonal_strength`: F_S of `--series` series.
- `split_interval`: 80 % and 95 % bounds of `--parents` parents split to their
  leaves (`--leaves-per-parent` on average) over the horizon.
- `tree_wls_var`: sparse WLS over total > `--regions` regions > `--parents`
  parents > leaves, residuals of `--weeks` periods, horizon `--horizon`.
- `tree_bottom_up_sd`: bottom-up means and independent-leaf standard deviations on that tree.
- `tree_mint_shrink`: MinT-shrink with coherent intervals on 10,000 families
  (a parent and its 10 leaves, the cycle's two-level case) and on 2,000
  product trees (product > 5 sites > 10 customers each, 56 nodes).
"""

from __future__ import annotations

import argparse
import json
import resource
import sys
import time
import tracemalloc
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from pipelines.engines.forecast_comparison import absolute_loss, class_loss_differential, dm_test  # noqa: E402
from pipelines.engines.group_seasonality import deseasonalise, group_seasonality, reseasonalise, seasonal_strength  # noqa: E402
from pipelines.engines.leaf_intervals import normal_bounds, split_interval, split_weights  # noqa: E402
from pipelines.engines.scaled_errors import pooled_rmsse, scaled_errors, volume_weights  # noqa: E402
from pipelines.engines.tree_reconciliation import reconcile_tree, tree_from_parent_codes  # noqa: E402


def measure(name: str, fn, results: list) -> None:
    started = time.perf_counter()
    fn()
    wall = time.perf_counter() - started
    tracemalloc.start()
    tracemalloc.reset_peak()
    fn()
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    results.append(
        {"case": name, "wall_s": round(wall, 3), "py_peak_mb": round(peak / 2**20, 1), "rss_max_mb": round(rss)}
    )
    print(f"{name:<28} {wall:9.2f} s  py peak {peak / 2**20:9.1f} MB  rss max {rss:8.0f} MB", flush=True)


def seasonal_panel(rng, n: int, t: int) -> np.ndarray:
    level = rng.uniform(1, 200, (n, 1))
    shape = 1 + 0.2 * np.sin(2 * np.pi * (np.arange(t) + rng.integers(0, 4, (n, 1))) / 52)
    return rng.poisson(level * shape).astype(float)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--series", type=int, default=100_000)
    ap.add_argument("--weeks", type=int, default=156)
    ap.add_argument("--horizon", type=int, default=26)
    ap.add_argument("--parents", type=int, default=100_000)
    ap.add_argument("--leaves-per-parent", type=int, default=10)
    ap.add_argument("--regions", type=int, default=50)
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--only", default="")
    ap.add_argument("--json")
    args = ap.parse_args()
    only = set(filter(None, args.only.split(",")))
    want = lambda name: not only or name in only  # noqa: E731
    rng = np.random.default_rng(args.seed)
    n, t, h = args.series, args.weeks, args.horizon
    results: list[dict] = []
    print(
        f"series {n:,} x {t} weeks, horizon {h}; tree: {args.parents:,} parents x ~{args.leaves_per_parent} leaves, "
        f"{args.regions} regions, 1 total",
        flush=True,
    )

    if want("scaled_errors") or want("class_loss") or want("dm_test"):
        history = seasonal_panel(rng, n, t)
        series = np.repeat(np.arange(n), t)
        y = history.ravel()
        actual = seasonal_panel(rng, n, h)
        forecast = actual * rng.uniform(0.7, 1.3, actual.shape)
        cls = rng.integers(0, 20, n)

        def scaled():
            out = scaled_errors(series, y, actual, forecast, m=1)
            weights = volume_weights(series, y, n, h)
            pooled_rmsse(out.rmsse, "volume", weights, cls, 20)

        if want("scaled_errors"):
            measure("scaled_errors", scaled, results)
        cells = 6 * h
        act6 = seasonal_panel(rng, n, cells)
        inc = absolute_loss(act6, act6 * rng.uniform(0.7, 1.3, act6.shape))
        chal = absolute_loss(act6, act6 * rng.uniform(0.7, 1.3, act6.shape))
        if want("class_loss"):
            measure("class_loss", lambda: class_loss_differential(inc, chal, cls, 20), results)
        d = rng.normal(0.05, 1, (10_000, cells))
        if want("dm_test"):
            measure("dm_test (10,000 tests)", lambda: dm_test(d, h=h, alternative="greater"), results)
        del history, series, y, act6, inc, chal

    if want("group_seasonality") or want("seasonal_strength"):
        x = seasonal_panel(rng, n, t)
        group = rng.integers(0, 1000, n)
        fc = rng.uniform(1, 200, (n, h))

        def gsi():
            gs = group_seasonality(x, group, 1000, period=52, form="multiplicative")
            deseasonalise(x, gs, 0)
            reseasonalise(fc, gs, t % 52)

        if want("group_seasonality"):
            measure("group_seasonality", gsi, results)
        if want("seasonal_strength"):
            measure("seasonal_strength", lambda: seasonal_strength(x, 52), results)
        del x

    n_parents = args.parents
    leaves_per = rng.integers(1, 2 * args.leaves_per_parent, n_parents)
    parent_of_leaf = np.repeat(np.arange(n_parents), leaves_per)
    n_leaves = len(parent_of_leaf)
    print(f"tree: {n_leaves:,} leaves", flush=True)

    if want("split_interval"):
        parent_fc = rng.uniform(10, 500, (n_parents, h))
        parent_sd = parent_fc * 0.2
        basis = rng.uniform(0, 1, (n_leaves, h))

        def split():
            lo, hi = normal_bounds(parent_fc, parent_sd, [80, 95])
            w, _ = split_weights(basis, parent_of_leaf, n_parents)
            split_interval(lo, hi, w, parent_of_leaf)

        measure("split_interval", split, results)
        del parent_fc, parent_sd, basis

    if want("tree_wls_var") or want("tree_bottom_up_sd"):
        region_of_parent = rng.integers(0, args.regions, n_parents)
        region_of_parent[: args.regions] = np.arange(args.regions)
        tree = tree_from_parent_codes([parent_of_leaf, region_of_parent, np.zeros(args.regions, dtype=np.int64)])
        leaf_level = rng.uniform(1, 50, (n_leaves, 1))
        base = tree.sums(leaf_level * rng.uniform(0.8, 1.2, (n_leaves, h))) * rng.uniform(0.95, 1.05, (tree.n_nodes, h))
        if want("tree_wls_var"):
            residuals = rng.normal(0, 1, (tree.n_nodes, t)) * np.sqrt(tree.sums(leaf_level))
            measure(
                f"tree_wls_var ({tree.n_nodes:,} nodes)",
                lambda: reconcile_tree(tree, base, "wls_var", residuals=residuals),
                results,
            )
            del residuals
        if want("tree_bottom_up_sd"):
            sigma = base * 0.2
            measure("tree_bottom_up_sd", lambda: reconcile_tree(tree, base, "bottom_up", sigma=sigma), results)
            del sigma
        del base, tree

    if want("tree_mint_shrink"):
        for label, codes in (
            ("families 10,000 x 11", [np.repeat(np.arange(10_000), 10)]),
            ("products 2,000 x 56", [np.repeat(np.arange(10_000), 10), np.repeat(np.arange(2_000), 5)]),
        ):
            tree = tree_from_parent_codes(codes)
            leaf_level = rng.uniform(1, 50, (tree.n_leaves, 1))
            base = tree.sums(leaf_level * rng.uniform(0.8, 1.2, (tree.n_leaves, h))) * rng.uniform(
                0.95, 1.05, (tree.n_nodes, h)
            )
            common = rng.normal(0, 1, (1, t))
            residuals = (rng.normal(0, 1, (tree.n_nodes, t)) + 0.5 * common) * np.sqrt(tree.sums(leaf_level))
            sigma = np.abs(base) * 0.2
            measure(
                f"tree_mint_shrink {label}",
                lambda tree=tree, base=base, residuals=residuals: reconcile_tree(
                    tree, base, "mint_shrink", residuals=residuals
                ),
                results,
            )
            measure(
                f"  + intervals {label}",
                lambda tree=tree, base=base, residuals=residuals, sigma=sigma: reconcile_tree(
                    tree, base, "mint_shrink", residuals=residuals, sigma=sigma
                ),
                results,
            )

    if args.json:
        Path(args.json).write_text(json.dumps({"args": vars(args), "results": results}, indent=2))


if __name__ == "__main__":
    main()
