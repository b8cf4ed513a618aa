"""The backtest's choices: RMSSE beside WMAPE, the metric by demand class, stable picks, no look-ahead.

Outside references, named beside each check:
- utilsforecast 0.2 `losses.rmsse` (Nixtla; an independent implementation of the M5 measure of
  Makridakis, Spiliotis & Assimakopoulos 2022, eq. 1) for the backtest's RMSSE;
- the dieboldmariano package (PyPI, E. Annunziata) for the DM-HLN test wired into strategy_choice;
- the Hampel filter of `pipelines.engines.outliers` (itself checked against its published reference in
  tests/test_hampel_reference.py) on the truncated history, for the cleaning at each origin.
The tolerance rule (keep the previous pick unless the challenger is more than 1 % better) is common
practice, no source: a hysteresis band.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from dieboldmariano import dm_test as reference_dm_test
from test_backtest import SES, frames
from utilsforecast.losses import rmsse as reference_rmsse

from pipelines.config import parse_config
from pipelines.config_sections import OutlierConfig
from pipelines.engines.origin_cleaning import ClassCleaning, clean_before
from pipelines.engines.outliers import judge_outliers
from pipelines.schemas_forecast import BacktestAccuracy, StrategyChoice
from pipelines.schemas_selection import BacktestLosses
from pipelines.stages.backtest_accuracy import run_backtest
from pipelines.stages.strategy_choice import StrategySettings, choose_strategies


def _config(origins=1, horizon=4, strategies=("top_down", "bottom_up"), **selection):
    return parse_config(
        {
            "product_classes": {"a": {"window": 13, "strategy": "auto", "models": SES}},
            "calendar": {"horizon": horizon},
            "backtest": {"origins": origins, "horizon": horizon, "step": horizon, "strategies": list(strategies)},
            "selection": {"share_tuning": {"windows": [13], "methods": ["pooled"]}, **selection},
        }
    )


def test_backtest_rmsse_of_seasonal_naive_equals_utilsforecast_pooled_by_recent_volume():
    rng = np.random.default_rng(3)
    y = rng.poisson([[[20.0] * 70, [8.0] * 70]]).astype(float)  # one parent, two children, 70 weeks
    history, children, cycle = frames(y)
    cfg = _config(origins=1, horizon=4)
    table = BacktestAccuracy.validate(run_backtest(history, children, cfg, cycle).accuracy)
    got = table[(table["strategy"] == "seasonal_naive") & (table["grain"] == "leaf") & (table["metric"] == "rmsse")]
    # by hand: origin = week 66; seasonal naive forecasts week t by week t - 52
    train = pd.DataFrame({"unique_id": np.repeat(["c0", "c1"], 66), "ds": np.tile(np.arange(66), 2),
                          "y": y[0, :, :66].ravel()})
    test = pd.DataFrame({"unique_id": np.repeat(["c0", "c1"], 4), "ds": np.tile(np.arange(66, 70), 2),
                         "y": y[0, :, 66:].ravel(), "sn": y[0, :, 14:18].ravel()})
    per_series = reference_rmsse(test, ["sn"], seasonality=1, train_df=train).set_index("unique_id")["sn"]
    weights = y[0, :, 62:66].sum(axis=1)  # units over the last h = 4 in-sample weeks (M5's weight, in units)
    expected = float((per_series.loc[["c0", "c1"]].to_numpy() * weights).sum() / weights.sum())
    assert float(got["value"].iloc[0]) == pytest.approx(expected, rel=1e-9)
    # the class is smooth: judged by WMAPE
    assert set(table["selection_metric"]) == {"wmape"}


def _accuracy(rows, metric="wmape"):
    """A leaf-grain accuracy table of class a from (strategy, wmape, rmsse) rows."""
    out = []
    for s, w, r in rows:
        out += [("a", s, "leaf", "wmape", w, 3, 4, 10, w, metric), ("a", s, "leaf", "rmsse", r, 3, 4, 10, r, metric)]
    cols = ["product_class", "strategy", "grain", "metric", "value", "origins", "horizon", "series", "value_cleaned",
            "selection_metric"]
    return pd.DataFrame(out, columns=cols)


def _settings(tolerance=0.01, level=0.05, switch_on="either", strategy="auto"):
    cfg = parse_config({
        "product_classes": {"a": {"window": 13, "strategy": strategy}},
        "backtest": {"strategies": ["top_down", "bottom_up"]},
        "selection": {"stability": {"tolerance": tolerance, "level": level, "switch_on": switch_on}},
    })
    return StrategySettings.of(cfg)


def _previous(strategy):
    return pd.DataFrame({"product_class": ["a"], "strategy": [strategy]})


def _losses(top_down: np.ndarray, bottom_up: np.ndarray, h: int = 4) -> pd.DataFrame:
    n = len(top_down)
    origins = pd.to_datetime("2026-01-05") + pd.to_timedelta(7 * h * (np.arange(n) // h), unit="D")
    frames = [
        pd.DataFrame({"product_class": "a", "strategy": s, "seasonality": "none", "origin": origins,
                      "step": np.arange(n) % h + 1,
                      "abs_loss": v, "squared_scaled_loss": v})
        for s, v in (("top_down", top_down), ("bottom_up", bottom_up))
    ]
    return BacktestLosses.validate(pd.concat(frames, ignore_index=True))


def test_auto_keeps_last_cycles_strategy_within_the_tolerance_and_switches_above_it():
    # common practice, no source: a 1 % relative band; 0.300 -> 0.2985 is 0.5 % better, 0.300 -> 0.290 3.3 %
    near = _accuracy([("top_down", 0.300, 1.0), ("bottom_up", 0.2985, 1.0), ("seasonal_naive", 0.5, 2.0)])
    far = _accuracy([("top_down", 0.300, 1.0), ("bottom_up", 0.290, 1.0), ("seasonal_naive", 0.5, 2.0)])
    kept = StrategyChoice.validate(choose_strategies(near, _settings(), previous=_previous("top_down"))).iloc[0]
    assert (kept["strategy"], kept["best"], kept["decision"]) == ("top_down", "bottom_up", "keep")
    assert kept["reason"] == "within_tolerance_not_significant" and "0.50 %" in kept["detail"]
    switched = choose_strategies(far, _settings(), previous=_previous("top_down")).iloc[0]
    assert (switched["strategy"], switched["decision"], switched["reason"]) == (
        "bottom_up", "switch", "gain_above_tolerance"
    )
    first = choose_strategies(near, _settings()).iloc[0]  # no previous cycle: the best
    assert (first["strategy"], first["decision"], first["reason"]) == ("bottom_up", "first", "no_incumbent")
    fixed = choose_strategies(far, _settings(strategy="top_down"), previous=_previous("bottom_up")).iloc[0]
    assert (fixed["strategy"], fixed["decision"], fixed["best"]) == ("top_down", "fixed", "bottom_up")


def test_a_significant_challenger_switches_inside_the_tolerance_by_the_dieboldmariano_test():
    rng = np.random.default_rng(5)
    inc = 10 + rng.normal(0, 0.05, 24)
    chal = inc - 0.02 + rng.normal(0, 0.005, 24)  # 0.2 % better, every period: tiny but certain
    accuracy = _accuracy([("top_down", 0.300, 1.0), ("bottom_up", 0.2994, 1.0), ("seasonal_naive", 0.5, 2.0)])
    choice = choose_strategies(accuracy, _settings(), _losses(inc, chal), _previous("top_down")).iloc[0]
    # reference: the dieboldmariano package, one-sided with the challenger first, HLN-corrected, h = 4
    _, p = reference_dm_test(np.zeros(24), chal, inc, loss=lambda u, v: v, h=4, one_sided=True)
    assert choice["p_value"] == pytest.approx(p, rel=1e-9) and p < 0.05
    assert (choice["strategy"], choice["reason"]) == ("bottom_up", "significant_by_test")
    # the same losses with the test asked for at a level the p-value does not reach: kept
    strict = choose_strategies(accuracy, _settings(level=p / 2), _losses(inc, chal), _previous("top_down")).iloc[0]
    assert strict["strategy"] == "top_down" and strict["decision"] == "keep"


def test_a_class_judged_by_rmsse_picks_the_lowest_rmsse_not_the_lowest_wmape():
    accuracy = _accuracy(
        [("top_down", 0.90, 0.80), ("bottom_up", 0.70, 1.20), ("seasonal_naive", 1.0, 1.0)], metric="rmsse"
    )
    choice = choose_strategies(accuracy, _settings()).iloc[0]
    assert (choice["strategy"], choice["metric"], choice["score"]) == ("top_down", "rmsse", 0.80)
    assert choice["leaf_wmape"] == 0.90 and choice["margin"] == pytest.approx(0.40)


def test_cleaning_at_an_origin_sees_nothing_after_it():
    rng = np.random.default_rng(11)
    n, t, origin = 3, 60, 45
    x = rng.poisson(20, (n, t)).astype(float)
    x[0, 43] = 200.0  # a spike two periods before the origin
    x[1, 44:] = 60.0  # a level shift starting one period before the origin
    code, ords = np.repeat(np.arange(n), t), np.tile(np.arange(t), n)
    rule = OutlierConfig(rule="hampel", window=13, k=3.0)
    rules = {"a": ClassCleaning(rule, seasonal=False)}
    args = (code, ords, x.ravel(), np.zeros(n * t, bool), np.array(["a"] * n, dtype=object), rules, origin, 52)
    seen = clean_before(*args).reshape(n, t)
    # reference: the cycle's Hampel rule on the history truncated at the origin
    truncated = x[:, :origin]
    judged = judge_outliers(truncated, rule)
    assert np.allclose(seen[:, :origin], np.where(judged.flagged, judged.replacement, truncated))
    assert seen[0, 43] < 200.0  # the spike is cut from what came before it
    # the level shift's first period is judged on the past alone; with the future it would be no outlier
    full = judge_outliers(x, rule)
    assert judged.flagged[1, 44] and not full.flagged[1, 44]
    # anything after the origin changes nothing before it
    later = x.copy()
    later[:, origin:] = rng.poisson(500, (n, t - origin))
    again = clean_before(code, ords, later.ravel(), *args[3:]).reshape(n, t)
    assert np.array_equal(again[:, :origin], seen[:, :origin])
    assert np.array_equal(seen[:, origin:], x[:, origin:])  # raw after the origin


def test_backtest_scores_against_raw_actuals_and_gives_the_cleaned_ones_as_second_column():
    rng = np.random.default_rng(2)
    y = rng.poisson([[[20.0] * 70, [8.0] * 70]]).astype(float)
    y[0, 0, 67] = 400.0  # a spike inside the held-back weeks
    history, children, cycle = frames(y)
    cleaned = history[["product", "site", "customer", "period_start"]].copy()
    cleaned["raw_quantity"] = history["quantity"]
    history.loc[history["quantity"] == 400.0, "quantity"] = 20.0  # the cycle's cleaning capped it
    history["shortage"] = False
    table = run_backtest(history, children, _config(), cycle, cleaned=cleaned).accuracy
    row = table[(table["strategy"] == "bottom_up") & (table["grain"] == "leaf") & (table["metric"] == "wmape")]
    # raw actuals hold the spike, so the raw WMAPE is far above the cleaned one
    assert float(row["value"].iloc[0]) > float(row["value_cleaned"].iloc[0]) + 0.5


def test_config_takes_window_and_method_auto_and_keeps_the_old_keys():
    cfg = parse_config({"product_classes": {
        "a": {"window": "auto", "method": "auto", "smoothing": 0.3, "fallback_windows": [104]},
        "b": {"window": 26, "method": "smoothed", "smoothing": 0.2},
    }})
    assert cfg.product_classes["a"].window == "auto" and cfg.product_classes["a"].method == "auto"
    assert cfg.product_classes["b"].window == 26
    assert cfg.selection.stability.tolerance == 0.01 and cfg.selection.metric.lumpy == "rmsse"
    with pytest.raises(Exception, match="smoothing applies only"):
        parse_config({"product_classes": {"a": {"window": 26, "method": "pooled", "smoothing": 0.3}}})
    with pytest.raises(Exception, match="window"):
        parse_config({"product_classes": {"a": {"window": "often"}}})
