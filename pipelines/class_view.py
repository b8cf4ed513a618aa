"""A class cut into shards as its readers show it: one strategy_choice row per class, with the class's figures.

A class that decides at class level (`strategy: auto` or `seasonality:
auto`) stores the same row in every shard: its choice over every shard's
backtest combined. A class with a fixed strategy and seasonality runs each
shard in one run, so each shard's row carries its own backtest's figures.
The summary and the cycle page show a class once, so for such a class they
take the class's figures from every shard's backtest added
(`pipelines.engines.backtest_combine.combine_accuracy`: the same sums an
uncut class is scored by): the chosen strategy's leaf WMAPE, RMSSE and score
by the class's metric, and seasonal naive's WMAPE. The decision, the reason
and the detail are the stored ones: a fixed class has no runner-up.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from pipelines.engines.backtest_combine import combine_accuracy
from pipelines.shards import class_shards, store_shards
from pipelines.store import read_table
from pipelines.vocabulary import BENCHMARK

ACCURACY = "backtest_accuracy"


def class_choice(store: Path | str, config, cycle: str, choice: pd.DataFrame | None,
                 versions: str = "published") -> pd.DataFrame | None:
    """`choice` (the stored strategy_choice of `cycle`, every shard's rows) with one row per class; see the module
    docstring. A class whose shards' backtests cannot be read keeps its first shard's row."""
    if choice is None or choice.empty:
        return choice
    choice = choice.drop_duplicates().reset_index(drop=True)
    rows = []
    for name, mine in choice.groupby("product_class", sort=False):
        row = mine.iloc[[0]].copy()
        if len(mine) > 1 and name in config.product_classes and class_shards(config, name) > 1:
            frames = [read_table(store, ACCURACY, cycle=cycle, product_class=name, shard=s, versions=versions)
                      for s in store_shards(config, name)]
            if all(f is not None and len(f) for f in frames):
                row = _class_figures(row, combine_accuracy(frames))
        rows.append(row)
    return pd.concat(rows, ignore_index=True)


def _class_figures(row: pd.DataFrame, accuracy: pd.DataFrame) -> pd.DataFrame:
    """The choice `row` (one) with its figures from the class's combined backtest `accuracy`."""
    r = row.iloc[0]
    leaf = accuracy[(accuracy["grain"] == "leaf") & (accuracy["seasonality"] == r.get("seasonality", "none"))]

    def value(strategy: str, metric: str) -> float:
        found = leaf.loc[(leaf["strategy"] == strategy) & (leaf["metric"] == metric), "value"]
        return float(found.iloc[0]) if len(found) else np.nan

    chosen = str(r["strategy"])
    out = row.copy()
    out["leaf_wmape"] = value(chosen, "wmape")
    out["leaf_rmsse"] = value(chosen, "rmsse")
    out["score"] = value(chosen, str(r["metric"]))
    out["seasonal_naive_wmape"] = value(str(BENCHMARK), "wmape")
    out["beats_seasonal_naive"] = not bool(out["leaf_wmape"].iloc[0] > out["seasonal_naive_wmape"].iloc[0])
    return out
