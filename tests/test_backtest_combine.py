"""The backtest tables of a class's shards combined into the class's (pipelines/engines/backtest_combine.py)."""

import numpy as np
import pandas as pd
import pytest
from stage_runs import spares_auto_runs

from pipelines.engines.backtest_combine import ACCURACY_KEY, ShardsDisagree, combine_accuracy, combine_losses
from pipelines.schemas_forecast import BacktestAccuracy
from pipelines.schemas_selection import BacktestLosses


def _rows(shard: dict, **counts) -> pd.DataFrame:
    """One shard's accuracy rows of class `a` (leaf grain, seasonality none) from metric -> (num, den) per strategy."""
    rows = []
    for (strategy, metric), (num, den) in shard.items():
        value = num / den if metric != "fva" and den > 0 else np.nan
        rows.append({
            "product_class": "a", "seasonality": "none", "strategy": strategy, "grain": "leaf", "metric": metric,
            "value": value, "origins": 2, "horizon": 3, "series": counts["series"], "value_cleaned": value,
            "selection_metric": counts["metric"], "numerator": num, "denominator": den, "numerator_cleaned": num,
            "denominator_cleaned": den, "leaf_series_wmape": counts["wmape"], "leaf_series_rmsse": counts["rmsse"],
            "leaf_series_mase": 0,
        })
    frame = pd.DataFrame(rows)
    wmape = frame[frame["metric"] == "wmape"].set_index("strategy")["value"]
    fva = frame["metric"] == "fva"  # as the backtest makes it: seasonal naive's WMAPE minus the strategy's
    frame.loc[fva, ["value", "value_cleaned"]] = (wmape["seasonal_naive"] - wmape["top_down"])
    return BacktestAccuracy.validate(frame)


NAN = (np.nan, np.nan)
# shard 1: top_down |e| 3 over actuals 10, seasonal naive 6 over 10; 3 leaves judged by wmape, 1 by rmsse
ONE = {("top_down", "wmape"): (3.0, 10.0), ("seasonal_naive", "wmape"): (6.0, 10.0), ("top_down", "fva"): NAN,
       ("top_down", "coverage_80"): (7.0, 9.0)}
# shard 2: top_down 5 over 30, seasonal naive 3 over 30; 4 leaves judged by rmsse
TWO = {("top_down", "wmape"): (5.0, 30.0), ("seasonal_naive", "wmape"): (3.0, 30.0), ("top_down", "fva"): NAN,
       ("top_down", "coverage_80"): (2.0, 6.0)}


def test_shards_add_their_sums_and_the_ratios_are_made_again():
    one = _rows(ONE, series=4, metric="wmape", wmape=3, rmsse=1)
    two = _rows(TWO, series=4, metric="rmsse", wmape=0, rmsse=4)
    out = BacktestAccuracy.validate(combine_accuracy([one, two])).set_index(["strategy", "metric"])
    # WMAPE = sum |e| / sum actual over every series and period (Kolassa & Schuetz 2007, Foresight 6, "the MAD/Mean
    # ratio"): (3 + 5) / (10 + 30) = 0.2, not the mean of the shards' 0.3 and 0.1667
    assert out.loc[("top_down", "wmape"), "value"] == pytest.approx(0.2, abs=1e-15)
    assert out.loc[("seasonal_naive", "wmape"), "value"] == pytest.approx(9 / 40, abs=1e-15)
    # forecast value added = the benchmark's error minus the forecast's (Gilliland 2013, Foresight 29, "FVA: A
    # Reality Check on Forecasting Practices"), from the class's WMAPEs: 0.225 - 0.2, in WMAPE points
    assert out.loc[("top_down", "fva"), "value"] == pytest.approx(0.025, abs=1e-15)
    assert np.isnan(out.loc[("top_down", "fva"), "numerator"])
    # coverage = actuals inside the interval / actuals scored: (7 + 2) / (9 + 6)
    assert out.loc[("top_down", "coverage_80"), "value"] == pytest.approx(0.6, abs=1e-15)
    # the metric of most leaf series (common practice, no source; `scaled_errors.class_metric`): 3 by wmape and
    # 5 by rmsse over the class, though shard 1 alone was judged by wmape
    assert set(out["selection_metric"]) == {"rmsse"}
    assert out["series"].eq(8).all() and out["leaf_series_rmsse"].eq(5).all() and out["leaf_series_wmape"].eq(3).all()


def test_one_shard_gives_its_table_back_and_shards_of_other_backtests_are_refused():
    one = _rows(ONE, series=4, metric="wmape", wmape=3, rmsse=1)
    pd.testing.assert_frame_equal(combine_accuracy([one]), one, check_exact=True)
    later = _rows(TWO, series=4, metric="rmsse", wmape=0, rmsse=4).assign(origins=1)
    with pytest.raises(ShardsDisagree, match="other origins or horizons"):
        combine_accuracy([one, later])


def test_losses_of_each_period_add():
    def losses(abs_loss, squared):
        return BacktestLosses.validate(pd.DataFrame({
            "product_class": "a", "strategy": "top_down", "seasonality": "none",
            "origin": pd.to_datetime(["2026-01-05", "2026-01-05"]), "step": [1, 2], "abs_loss": abs_loss,
            "squared_scaled_loss": squared,
        }))

    out = combine_losses([losses([1.0, 2.0], [0.5, 0.25]), losses([3.0, 0.0], [1.0, 0.0])])
    assert out["abs_loss"].tolist() == [4.0, 2.0] and out["squared_scaled_loss"].tolist() == [1.5, 0.25]


# columns that add counts (exact whatever the order) and the keys; the rest are float sums and their ratios
EXACT = ACCURACY_KEY + ["origins", "horizon", "series", "selection_metric", "leaf_series_wmape",
                        "leaf_series_rmsse", "leaf_series_mase"]


def _by_key(frame: pd.DataFrame) -> pd.DataFrame:
    return frame.sort_values(ACCURACY_KEY).reset_index(drop=True)


def test_eight_shards_of_the_demo_combine_into_the_whole_class_backtest():
    runs = spares_auto_runs(8)
    whole = runs.whole.tables["backtest_accuracy"]
    # one shard (the class not cut) combined is its own table, bit for bit
    pd.testing.assert_frame_equal(combine_accuracy([whole]), whole, check_exact=True)
    cut, one = _by_key(runs.accuracy), _by_key(whole)
    assert len(cut) == len(one) > 50
    pd.testing.assert_frame_equal(cut[EXACT], one[EXACT], check_exact=True)
    coverage = one["metric"].str.startswith("coverage_")
    # coverage counts cells: its sums are integers, exact in any order
    pd.testing.assert_frame_equal(cut.loc[coverage], one.loc[coverage], check_exact=True)
    # a float sum adds the class's series in another order when cut (each shard's partial sum, then theirs): the
    # same to 1e-12 relative (seen: at most 2e-15)
    for column in ("value", "value_cleaned", "numerator", "denominator", "numerator_cleaned", "denominator_cleaned"):
        np.testing.assert_allclose(cut[column], one[column], rtol=1e-12, atol=0, equal_nan=True, err_msg=column)
    losses = ["product_class", "seasonality", "strategy", "origin", "step"]
    mine = runs.losses.sort_values(losses).reset_index(drop=True)
    theirs = runs.whole.tables["backtest_losses"].sort_values(losses).reset_index(drop=True)
    pd.testing.assert_frame_equal(mine[losses], theirs[losses], check_exact=True)
    for column in ("abs_loss", "squared_scaled_loss"):
        np.testing.assert_allclose(mine[column], theirs[column], rtol=1e-12, atol=1e-12, err_msg=column)


def test_the_keep_or_switch_test_on_combined_losses_is_the_whole_class_test():
    # last cycle's strategy bottom_up against this cycle's best: the one-sided DM test with the HLN correction
    # (Harvey, Leybourne & Newbold 1997, IJF 13) on the per-period class losses; the shards' losses added give
    # the class's p-value and decision
    from pipelines.stages.strategy_choice import StrategySettings, choose_strategies

    runs = spares_auto_runs(8)
    settings = StrategySettings(("top_down", "forecast_proportions", "bottom_up", "mint_shrink", "wls_var"),
                                {"spares": "auto"})
    previous = pd.DataFrame({"product_class": ["spares"], "strategy": ["bottom_up"]})
    cut = choose_strategies(runs.accuracy, settings, runs.losses, previous)
    whole = choose_strategies(runs.whole.tables["backtest_accuracy"], settings, runs.whole.tables["backtest_losses"],
                              previous)
    assert np.isfinite(whole["p_value"].iloc[0])  # tested, not skipped
    ratios = ["leaf_wmape", "margin", "seasonal_naive_wmape", "score", "leaf_rmsse", "p_value"]
    pd.testing.assert_frame_equal(cut.drop(columns=ratios), whole.drop(columns=ratios), check_exact=True)
    pd.testing.assert_frame_equal(cut[ratios], whole[ratios], check_exact=False, rtol=1e-12, atol=0)
