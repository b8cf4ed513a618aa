"""What the backtest leaves out and makes once: a fixed strategy's others, the share candidates per origin.

A class with a fixed strategy can only follow that strategy, so the backtest scores it alone (and
seasonal naive); its scores, its share tuning and the strategy_choice row must be those of the same
class backtested with every strategy. With `seasonality: auto` the share candidates do not depend on
the seasonality: their period shares are made once per origin and tuned once, on the parent forecasts
of the class's first seasonality (`none`), which then split every seasonality's top-down forecasts.
The data are the synthetic, seeded series of tests/test_seasonality_intervals.py.
"""

from __future__ import annotations

import pandas as pd
import pytest
from test_seasonality_intervals import CYCLE, KEYS, SES, WEEKS, _series

import pipelines.engines.backtest_origins as origins_module
import pipelines.engines.base_forecasts as base_module
from pipelines.schemas_forecast import BacktestAccuracy
from pipelines.stages.backtest_accuracy import run_backtest
from pipelines.stages.strategy_choice import StrategySettings, choose_strategies

STRATEGIES = ["top_down", "forecast_proportions", "bottom_up", "mint_shrink"]
KEY = ["seasonality", "strategy", "grain", "metric"]


def _history(make_history):
    return make_history(
        [(p, s, c, str(w.date()), q) for (p, s, c), qs in _series().items() for w, q in zip(WEEKS, qs, strict=True)]
    )


def _config(make_config, strategy, seasonality="none", window=52, method="pooled"):
    return make_config(
        {"a": {"window": window, "method": method, "strategy": strategy, "models": SES, "seasonality": seasonality}},
        backtest={"origins": 2, "horizon": 13, "step": 13, "strategies": STRATEGIES},
        selection={"share_tuning": {"windows": [26, 52], "methods": ["pooled", "mean_of_ratios"]}},
        intervals={"levels": [80]},
    )


def _fitted_series(monkeypatch) -> dict[str, int]:
    """Counts the series `base_forecasts` fits at each grain (parents: 4, leaves: 8 per origin here)."""
    fitted = {"series": 0}
    real = base_module.run_model_groups

    def counting(grid, *args, **kwargs):
        fitted["series"] += grid.n_series
        return real(grid, *args, **kwargs)

    monkeypatch.setattr(base_module, "run_model_groups", counting)
    return fitted


def test_a_fixed_top_down_class_is_scored_with_top_down_alone_and_keeps_every_number(
    make_history, make_children, make_config, monkeypatch
):
    history, children = _history(make_history), make_children(KEYS)
    fitted = _fitted_series(monkeypatch)
    every = run_backtest(history, children, _config(make_config, "auto"), CYCLE)
    all_fitted = fitted["series"]
    fitted["series"] = 0
    fixed = run_backtest(history, children, _config(make_config, "top_down"), CYCLE)
    # 2 origins x (4 parents + 8 leaves) for auto; the parents alone for top_down
    assert (all_fitted, fitted["series"]) == (24, 8)
    table = BacktestAccuracy.validate(fixed.accuracy)
    assert set(table["strategy"]) == {"top_down", "seasonal_naive"}
    assert set(every.accuracy["strategy"]) == set(STRATEGIES) | {"seasonal_naive"}
    kept = every.accuracy[every.accuracy["strategy"].isin(["top_down", "seasonal_naive"])]
    pd.testing.assert_frame_equal(
        table.sort_values(KEY).reset_index(drop=True), kept.sort_values(KEY).reset_index(drop=True),
        check_dtype=False,
    )
    assert set(fixed.losses["strategy"]) == {"top_down", "seasonal_naive"}
    pd.testing.assert_frame_equal(fixed.tuning, every.tuning)
    # strategy_choice: the same strategy, scores and seasonal naive; no runner-up among strategies not backtested
    settings = StrategySettings(tuple(STRATEGIES), {"a": "top_down"})
    got = choose_strategies(fixed.accuracy, settings, fixed.losses).iloc[0]
    before = choose_strategies(every.accuracy, settings, every.losses).iloc[0]
    for column in ("strategy", "leaf_wmape", "leaf_rmsse", "score", "seasonal_naive_wmape", "beats_seasonal_naive"):
        assert got[column] == before[column], column
    assert before["runner_up"] != "" and got["runner_up"] == "" and pd.isna(got["margin"])


def test_auto_seasonality_makes_the_share_candidates_once_per_origin_and_tunes_them_once(
    make_history, make_children, make_config, monkeypatch
):
    history, children = _history(make_history), make_children(KEYS)
    calls = {"n": 0}
    real = origins_module.compute_shares

    def counting(*args, **kwargs):
        calls["n"] += 1
        return real(*args, **kwargs)

    monkeypatch.setattr(origins_module, "compute_shares", counting)
    auto = run_backtest(history, children, _config(make_config, "auto", "auto", "auto", "auto"), CYCLE)
    # 2 origins x 4 candidates (26, 52) x (pooled, mean_of_ratios); once per seasonality compared would be 16
    assert calls["n"] == 8
    assert set(auto.accuracy["seasonality"]) == {"none", "group"}
    none = run_backtest(history, children, _config(make_config, "auto", "none", "auto", "auto"), CYCLE)
    pd.testing.assert_frame_equal(auto.tuning, none.tuning)  # tuned on the first seasonality's parents
    # the group rows split by that choice: those of a group-only run fixed to the chosen window and method
    chosen = auto.tuning[auto.tuning["chosen"]].iloc[0]
    group = run_backtest(
        history, children,
        _config(make_config, "auto", "group", int(chosen["window"]), str(chosen["method"])), CYCLE,
    )
    mine = auto.accuracy[(auto.accuracy["seasonality"] == "group") & (auto.accuracy["strategy"] == "top_down")]
    theirs = group.accuracy[group.accuracy["strategy"] == "top_down"]
    assert mine.sort_values(KEY)["value"].to_numpy() == pytest.approx(theirs.sort_values(KEY)["value"].to_numpy())


def test_a_fixed_class_beside_an_auto_class_in_one_run_leaves_the_auto_class_as_it_is_alone(
    make_history, make_children, make_config
):
    history = _history(make_history)
    both = make_children([(p, s, c, "a" if p == "P1" else "b") for p, s, c in KEYS])
    classes = {
        name: {"window": 52, "method": "pooled", "strategy": strategy, "models": SES, "seasonality": "none"}
        for name, strategy in (("a", "auto"), ("b", "top_down"))
    }
    sections = {
        "backtest": {"origins": 2, "horizon": 13, "step": 13, "strategies": STRATEGIES},
        "selection": {"share_tuning": {"windows": [52], "methods": ["pooled"]}},
        "intervals": {"levels": [80]},
    }
    together = run_backtest(history, both, make_config(classes, **sections), CYCLE).accuracy
    alone = run_backtest(
        history[history["product"] == "P1"], both[both["product_class"] == "a"],
        make_config({"a": classes["a"]}, **sections), CYCLE,
    ).accuracy
    assert set(together.loc[together["product_class"] == "b", "strategy"]) == {"top_down", "seasonal_naive"}
    mine = together[together["product_class"] == "a"]
    assert set(mine["strategy"]) == set(STRATEGIES) | {"seasonal_naive"}
    # MinT runs over both classes' parents at once: class b's (without leaf models) must not touch class a's rows
    assert mine.sort_values(KEY)["value"].to_numpy() == pytest.approx(alone.sort_values(KEY)["value"].to_numpy(),
                                                                      nan_ok=True)
