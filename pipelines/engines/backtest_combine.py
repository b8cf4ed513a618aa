"""The backtest tables of a class's shards combined into the class's: the sums add, the ratios are made again.

Every value of `backtest_accuracy` is a ratio of two sums over the class's
series, periods and origins (`backtest_scores.ScoreBook.parts`): WMAPE
sum |e| / sum actual, bias sum e / sum actual, MASE sum |e|/q / scored cells
(Hyndman & Koehler 2006), RMSSE the volume-weighted sum of per-series RMSSE /
the weights (M5's pooling), interval coverage the cells inside / the cells
scored. Each row keeps its two sums (`numerator`, `denominator`, and against
the cleaned actuals `numerator_cleaned`, `denominator_cleaned`). The shards
of a class hold disjoint sets of series scored at the same origins, so the
class's sums are the shards' sums added, and its value their ratio again
(NaN where the denominator is not positive, as the backtest does). Forecast
value added is a difference of two WMAPEs (seasonal naive's minus the
strategy's), made again from the combined WMAPEs. The class's selection
metric is the one most of its leaf series' demand classes are judged by
(`scaled_errors.class_metric`): each shard keeps its counts per metric
(`leaf_series_wmape`, ...), which add too. `backtest_losses` holds sums over
the class's leaves per origin x step (the DM-HLN test's losses): they add.

Exactness: counts (`series`, the selection counts, coverage cells) add
exactly. A float sum over the class adds its series in another order when it
is cut into shards (the shards' partial sums, then their total), so a
combined numerator, denominator or loss equals the whole class's to about
1e-15 relative, and a ratio made from them to about 1e-12 (`tests/
test_backtest_combine.py`). One shard combined gives its table back bit for
bit. The shards are added in the order given, so every shard that combines
the same tables gets the same bits.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from pipelines.engines.backtest_scores import PART_COLUMNS, ratio
from pipelines.engines.scaled_errors import METRICS, metric_of_mass
from pipelines.errors import PlanningError
from pipelines.vocabulary import BENCHMARK

SELECTION_COUNT_COLUMNS = [f"leaf_series_{m}" for m in METRICS]
ACCURACY_KEY = ["product_class", "seasonality", "strategy", "grain", "metric"]
LOSS_KEY = ["product_class", "seasonality", "strategy", "origin", "step"]
LOSS_SUMS = ["abs_loss", "squared_scaled_loss"]
FVA = "fva"


class ShardsDisagree(PlanningError):
    """The shards' tables were not made with the same backtest (origins, horizon): they do not add."""


def selection_counts(table: pd.DataFrame, classes: list[str], mass: np.ndarray) -> pd.DataFrame:
    """`table` with each class's leaf series per selection metric (`mass` (n_classes, len(METRICS)) of
    `scaled_errors.class_metric`, counted in series) on every row of the class."""
    counts = pd.DataFrame(np.rint(mass).astype(np.int64), columns=SELECTION_COUNT_COLUMNS)
    counts["product_class"] = classes
    return table.drop(columns=SELECTION_COUNT_COLUMNS, errors="ignore").merge(counts, on="product_class", how="left")


def combine_accuracy(shards: list[pd.DataFrame]) -> pd.DataFrame:
    """The class's backtest_accuracy from its shards' (the same columns, rows in order of first appearance).

    A ShardsDisagree error when two shards evaluated a class at other origins
    or horizons. See the module docstring.
    """
    if not shards:
        raise ValueError("combine_accuracy: no shard tables to combine")
    columns = list(shards[0].columns)
    both = pd.concat([s.assign(_shard=i) for i, s in enumerate(shards)], ignore_index=True)
    if both.empty:
        return shards[0].iloc[0:0].copy()
    _same_backtest(both)
    grouped = both.groupby(ACCURACY_KEY, sort=False)
    out = grouped[["origins", "horizon", "value_cleaned", "selection_metric"]].first()
    out["series"] = grouped["series"].sum()
    for column in PART_COLUMNS:
        out[column] = grouped[column].sum(min_count=1)  # all NaN (fva, a coverage's cleaned side) stays NaN
    out = out.reset_index()
    out["value"] = ratio(out["numerator"], out["denominator"])
    out["value_cleaned"] = ratio(out["numerator_cleaned"], out["denominator_cleaned"])
    out = _forecast_value_added(out)
    out = _selection(out, both)
    return out[columns]


def combine_losses(shards: list[pd.DataFrame]) -> pd.DataFrame:
    """The class's backtest_losses from its shards': the leaf losses of each origin x step added."""
    if not shards:
        raise ValueError("combine_losses: no shard tables to combine")
    columns = list(shards[0].columns)
    both = pd.concat(shards, ignore_index=True)
    if both.empty:
        return shards[0].iloc[0:0].copy()
    return both.groupby(LOSS_KEY, sort=False)[LOSS_SUMS].sum().reset_index()[columns]


def _same_backtest(both: pd.DataFrame) -> None:
    runs = both.groupby("product_class")[["origins", "horizon"]].nunique()
    differ = runs[(runs > 1).any(axis=1)].index.tolist()
    if differ:
        seen = both[both["product_class"].isin(differ)].drop_duplicates(["_shard", "origins", "horizon"])
        raise ShardsDisagree(
            f"the shards of class {differ} were backtested at other origins or horizons "
            f"({seen[['_shard', 'origins', 'horizon']].to_dict('records')}): rerun every shard of the class up to the "
            "backtest with the same config (python -m pipelines cycle --class <class>)"
        )


def _forecast_value_added(out: pd.DataFrame) -> pd.DataFrame:
    """fva = seasonal naive's WMAPE minus the strategy's, at the same class, seasonality and grain."""
    where = ["product_class", "seasonality", "grain"]
    wmape = out[out["metric"] == "wmape"]
    own = wmape.set_index(where + ["strategy"])[["value", "value_cleaned"]]
    bench = wmape[wmape["strategy"] == BENCHMARK].set_index(where)[["value", "value_cleaned"]]
    fva = out["metric"] == FVA
    rows = out.loc[fva, where + ["strategy"]]
    mine = own.reindex(pd.MultiIndex.from_frame(rows)).to_numpy()
    base = bench.reindex(pd.MultiIndex.from_frame(rows[where])).to_numpy()
    out.loc[fva, ["value", "value_cleaned"]] = base - mine
    return out


def _selection(out: pd.DataFrame, both: pd.DataFrame) -> pd.DataFrame:
    """Each class's selection counts added over its shards, and the metric they choose."""
    per_shard = both.drop_duplicates(["_shard", "product_class"])
    counts = per_shard.groupby("product_class", sort=False)[SELECTION_COUNT_COLUMNS].sum()
    empty = per_shard.groupby("product_class", sort=False)["selection_metric"].first()  # every shard's, when none
    metric, _ = metric_of_mass(counts.to_numpy(float), "")
    chosen = pd.Series(np.where(metric == "", empty.reindex(counts.index).to_numpy(), metric), index=counts.index)
    out = out.drop(columns=SELECTION_COUNT_COLUMNS, errors="ignore").merge(
        counts.reset_index(), on="product_class", how="left"
    )
    out["selection_metric"] = out["product_class"].map(chosen)
    return out
