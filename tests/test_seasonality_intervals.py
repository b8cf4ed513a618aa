"""Group seasonal indices and prediction intervals through the cycle (`statistical_forecast`).

Outside references: statsmodels 0.14 `seasonal_decompose(model="multiplicative", period=52)` of each
group's aggregate gives the index (Withycombe 1989's combined index: the classical index of the
group's sum), and statsforecast's `SimpleExponentialSmoothingOptimized` on the history divided by
it gives the deseasonalised forecast; the cycle's parent forecast must be the one times the other.
statsforecast's `AutoETS(model="ANN")` with `level=[80, 95]` gives the parent intervals of an ETS
class. The data are synthetic and seeded: two products with opposite yearly waves, two sites each.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from test_statistical_forecast import targets

from pipelines.errors import ConfigError
from pipelines.schemas_forecast import ForecastModels, ParentForecast, StatisticalForecast
from pipelines.stages.statistical_forecast import forecast_cycle

T = 156
CYCLE = pd.Timestamp("2026-11-30")
WEEKS = pd.date_range(end=CYCLE - pd.Timedelta(days=7), periods=T, freq="W-MON")
HORIZON = pd.date_range(CYCLE, periods=8, freq="W-MON")
SES = {k: "ses" for k in ("smooth", "erratic", "intermittent", "lumpy")}
ETS = {k: "auto_ets" for k in ("smooth", "erratic", "intermittent", "lumpy")}
KEYS = [(p, s, c) for p in ("P1", "P2") for s in ("S1", "S2") for c in ("C1", "C2")]


def _series() -> dict[tuple[str, str, str], np.ndarray]:
    rng = np.random.default_rng(13)
    t = np.arange(T)
    out = {}
    for p, s, c in KEYS:
        wave = 1 + 0.3 * np.sin(2 * np.pi * t / 52 + (0 if p == "P1" else np.pi))
        level = rng.uniform(20, 60)
        out[(p, s, c)] = np.round(level * wave * rng.uniform(0.85, 1.15, T))
    return out


def _cycle(make_history, make_children, make_config, seasonality, models=SES, strategy="top_down", chosen=None):
    series = _series()
    history = make_history(
        [(p, s, c, str(w.date()), q) for (p, s, c), qs in series.items() for w, q in zip(WEEKS, qs, strict=True)]
    )
    children = make_children(KEYS)
    tg = targets([(p, s, c, h, 1.0) for (p, s, c) in KEYS for h in HORIZON])
    config = make_config(
        {"a": {"window": 52, "strategy": strategy, "models": models, "seasonality": seasonality}},
        calendar={"horizon": len(HORIZON)},
    )
    return forecast_cycle(history, children, tg, config, CYCLE, chosen_seasonality=chosen), series


def test_group_index_from_the_aggregate_times_the_deseasonalised_forecast_equals_statsmodels_and_statsforecast(
    make_history, make_children, make_config
):
    from statsforecast import StatsForecast
    from statsforecast.models import SimpleExponentialSmoothingOptimized
    from statsmodels.tsa.seasonal import seasonal_decompose

    res, series = _cycle(make_history, make_children, make_config, "group")
    for product in ("P1", "P2"):
        aggregate = sum(v for k, v in series.items() if k[0] == product)
        seasonal = seasonal_decompose(aggregate, model="multiplicative", period=52).seasonal
        index_hist = seasonal  # periodic, aligned with the history's first week
        index_h = seasonal[T - 52 : T - 52 + len(HORIZON)]  # the horizon's weeks one year earlier
        for site in ("S1", "S2"):
            y = sum(v for k, v in series.items() if k[:2] == (product, site))
            frame = pd.DataFrame({"unique_id": 0, "ds": np.arange(T), "y": y / index_hist})
            flat = StatsForecast(models=[SimpleExponentialSmoothingOptimized()], freq=1).forecast(df=frame, h=8)
            expected = flat.iloc[:, 2].to_numpy() * index_h
            got = res.parent[(res.parent["product"] == product) & (res.parent["site"] == site)]
            np.testing.assert_allclose(got.sort_values("period_start")["forecast"], expected, rtol=1e-6)
    # the waves are opposite, so the two products' forecasts move in opposite directions over the horizon
    p1 = res.parent[res.parent["product"] == "P1"].groupby("period_start")["forecast"].sum().to_numpy()
    p2 = res.parent[res.parent["product"] == "P2"].groupby("period_start")["forecast"].sum().to_numpy()
    assert np.sign(p1[-1] - p1[0]) == -np.sign(p2[-1] - p2[0])
    models = ForecastModels.validate(res.models)
    assert set(models["seasonality"]) == {"group"}
    # each parent's group is its product; the aggregate's seasonal strength is recorded, higher than a parent's
    assert models["group_seasonal_strength"].notna().all()
    parents = models[models["grain"] == "parent"]
    assert (parents["group_seasonal_strength"] > 0.8).all() and parents["seasonal_strength"].between(0, 1).all()


def test_none_runs_the_models_on_the_raw_history_and_auto_needs_the_backtest(
    make_history, make_children, make_config
):
    none, _ = _cycle(make_history, make_children, make_config, "none")
    group, _ = _cycle(make_history, make_children, make_config, "group")
    assert not np.allclose(none.parent["forecast"], group.parent["forecast"])
    chosen, _ = _cycle(make_history, make_children, make_config, "auto", chosen={"a": "group"})
    np.testing.assert_allclose(chosen.parent["forecast"], group.parent["forecast"])
    with pytest.raises(ConfigError, match="seasonality is 'auto' but the backtest made no choice"):
        _cycle(make_history, make_children, make_config, "auto")


def test_ets_parent_intervals_are_statsforecasts_and_carried_to_the_leaves_by_the_split_weights(
    make_history, make_children, make_config
):
    from statsforecast import StatsForecast
    from statsforecast.models import AutoETS

    res, series = _cycle(make_history, make_children, make_config, "none", models=ETS)
    parent = ParentForecast.validate(res.parent)
    leaf = StatisticalForecast.validate(res.leaf)
    y = sum(v for k, v in series.items() if k[:2] == ("P1", "S1"))
    ref = StatsForecast(models=[AutoETS(season_length=1)], freq=1).forecast(
        df=pd.DataFrame({"unique_id": 0, "ds": np.arange(T), "y": y}), h=8, level=[80, 95]
    )
    got = parent[(parent["product"] == "P1") & (parent["site"] == "S1")].sort_values("period_start")
    for column in ("lo-80", "hi-80", "lo-95", "hi-95"):
        bound = ("lower_" if column.startswith("lo") else "upper_") + column[-2:]
        np.testing.assert_allclose(got[bound], np.clip(ref[f"AutoETS-{column}"], 0, None), rtol=1e-6)
    # top-down: every leaf's bounds are its share of the parent's (fixed weights within a period)
    both = leaf.merge(parent, on=["product", "site", "period_start"], suffixes=("", "_p"))
    weight = both["forecast"] / both["forecast_p"]
    for bound in ("lower_80", "upper_80", "lower_95", "upper_95"):
        np.testing.assert_allclose(both[bound], weight * both[f"{bound}_p"], rtol=1e-9)
    assert (leaf["lower_80"] <= leaf["forecast"]).all() and (leaf["forecast"] <= leaf["upper_80"]).all()
    assert (leaf["upper_80"] <= leaf["upper_95"]).all()


def test_bottom_up_parent_interval_is_the_sum_of_independent_leaves(make_history, make_children, make_config):
    res, _ = _cycle(make_history, make_children, make_config, "none", models=ETS, strategy="bottom_up")
    z80 = 1.2815515655446004  # standard normal quantile 0.9
    leaf_sd = (res.leaf["upper_80"] - res.leaf["forecast"]) / z80
    var = (leaf_sd**2).groupby([res.leaf["product"], res.leaf["site"], res.leaf["period_start"]]).sum()
    parent = res.parent.set_index(["product", "site", "period_start"])
    np.testing.assert_allclose((parent["upper_80"] - parent["forecast"]) / z80, np.sqrt(var.loc[parent.index]),
                               rtol=1e-9)


def test_auto_seasonality_is_the_backtests_lower_leaf_wmape_and_the_strategy_is_chosen_under_it():
    from pipelines.stages.strategy_choice import StrategySettings
    from pipelines.stages.strategy_choice import run as choose

    rows = []
    for season, scores in (("none", {"top_down": 0.30, "bottom_up": 0.28}), ("group", {"top_down": 0.27,
                                                                                         "bottom_up": 0.29})):
        for strategy, v in {**scores, "seasonal_naive": 0.4}.items():
            rows.append(("a", season, strategy, "leaf", "wmape", v, 3, 13, 10))
    acc = pd.DataFrame(rows, columns=["product_class", "seasonality", "strategy", "grain", "metric", "value",
                                      "origins", "horizon", "series"])
    settings = StrategySettings(("top_down", "bottom_up"), {"a": "auto"}, seasonality={"a": "auto"})
    out = choose(acc, settings).outputs["strategy_choice"].iloc[0]
    # the best pair is (group, top_down) at 0.27, though bottom_up wins under none
    assert (out["seasonality"], out["strategy"], out["leaf_wmape"]) == ("group", "top_down", 0.27)
    fixed = StrategySettings(("top_down", "bottom_up"), {"a": "bottom_up"}, seasonality={"a": "auto"})
    out = choose(acc, fixed).outputs["strategy_choice"].iloc[0]
    assert (out["seasonality"], out["strategy"]) == ("none", "bottom_up")  # 0.28 under none beats 0.29
    configured = StrategySettings(("top_down", "bottom_up"), {"a": "auto"}, seasonality={"a": "none"})
    assert choose(acc, configured).outputs["strategy_choice"].iloc[0]["seasonality"] == "none"


def test_auto_seasonality_of_an_intermittent_class_is_judged_by_its_selection_metric_rmsse():
    """WMAPE rewards forecasting zero on intermittent demand, RMSSE does not (M5: Makridakis, Spiliotis &
    Assimakopoulos 2022, section 3.1); the seasonality must be chosen by the class's metric, as the strategy is.

    Worked by hand, one leaf, actuals [0, 0, 4, 0], in-sample mean squared naive difference q2 = 4:
    none  forecasts [0, 0, 0, 0]: WMAPE = 4 / 4 = 1.0, RMSSE = sqrt(mean([0, 0, 16, 0]) / 4) = 1.0
    group forecasts [1, 1, 1, 1]: WMAPE = 6 / 4 = 1.5, RMSSE = sqrt(mean([1, 1, 9, 1]) / 4) = sqrt(0.75)
    so WMAPE picks none and RMSSE picks group.
    """
    from pipelines.engines.scaled_errors import rmsse
    from pipelines.engines.seasonal_base import choose_seasonality
    from pipelines.stages.strategy_choice import StrategySettings
    from pipelines.stages.strategy_choice import run as choose

    actual = np.array([[0.0, 0.0, 4.0, 0.0]])
    forecasts = {"none": np.zeros((1, 4)), "group": np.ones((1, 4))}
    rows = []
    for season, fc in forecasts.items():
        wmape = float(np.abs(fc - actual).sum() / actual.sum())
        score = float(rmsse(actual, fc, np.array([4.0]))[0])
        for metric, v in (("wmape", wmape), ("rmsse", score)):
            rows.append(("a", season, "top_down", "leaf", metric, v, 1, 4, 1, "rmsse"))
            rows.append(("a", season, "seasonal_naive", "leaf", metric, v + 1.0, 1, 4, 1, "rmsse"))
    acc = pd.DataFrame(rows, columns=["product_class", "seasonality", "strategy", "grain", "metric", "value",
                                      "origins", "horizon", "series", "selection_metric"])
    by = acc[acc["strategy"] == "top_down"].set_index(["seasonality", "metric"])["value"]
    assert (by["none", "wmape"], by["group", "wmape"]) == (1.0, 1.5)
    assert by["none", "rmsse"] == pytest.approx(1.0) and by["group", "rmsse"] == pytest.approx(np.sqrt(0.75))
    _, chosen = choose_seasonality(acc, {"a": "auto"}, {"a": "top_down"}, ("top_down",))
    assert chosen == {"a": "group"}  # by leaf WMAPE it would be none
    out = choose(acc, StrategySettings(("top_down",), {"a": "top_down"}, seasonality={"a": "auto"}))
    row = out.outputs["strategy_choice"].iloc[0]
    assert (row["seasonality"], row["metric"]) == ("group", "rmsse")
    # the same table judged by WMAPE (a smooth class) keeps none
    _, chosen = choose_seasonality(acc.assign(selection_metric="wmape"), {"a": "auto"}, {"a": "top_down"},
                                   ("top_down",))
    assert chosen == {"a": "none"}


def test_the_backtest_compares_none_with_group_and_scores_interval_coverage(make_history, make_children, make_config):
    from pipelines.schemas_forecast import BacktestAccuracy
    from pipelines.stages.backtest_accuracy import run_backtest

    series = _series()
    history = make_history(
        [(p, s, c, str(w.date()), q) for (p, s, c), qs in series.items() for w, q in zip(WEEKS, qs, strict=True)]
    )
    config = make_config(
        {"a": {"window": 52, "strategy": "auto", "models": SES, "seasonality": "auto"}},
        backtest={"origins": 2, "horizon": 13, "step": 13, "strategies": ["top_down", "bottom_up"]},
    )
    table = BacktestAccuracy.validate(run_backtest(history, make_children(KEYS), config, CYCLE).accuracy)
    assert set(table["seasonality"]) == {"none", "group"}
    wmape = table[table["metric"] == "wmape"].set_index(["seasonality", "strategy", "grain"])["value"]
    # a +-30 % yearly wave: the group index pays at both grains over a flat SES
    assert wmape["group", "top_down", "parent"] < 0.8 * wmape["none", "top_down", "parent"]
    cover = table[table["metric"].isin(["coverage_80", "coverage_95"])]
    assert set(cover["strategy"]) == {"top_down", "bottom_up"} and cover["value"].between(0, 1).all()
    c = cover.set_index(["seasonality", "strategy", "grain", "metric"])["value"]
    assert (c[:, :, :, "coverage_95"].to_numpy() >= c[:, :, :, "coverage_80"].to_numpy()).all()
