"""Share window and method by backtest (`pipelines.engines.share_tuning`, the backtest stage's `share_tuning`).

Behaviour (common practice, no source): when the children's mix changes shortly before the cycle, a
short share window follows the new mix and splits the held-back weeks better than a long one, which
still averages the old mix in; on a stable mix the long window wins, since it averages out noise.
The data are synthetic and seeded. The WARN check `share_choice_near_best` is made to fire (a fixed
long window after a change of mix) and to pass (the same gain under a higher threshold).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from test_backtest import SES, frames

from pipelines.checks import SHARE_CHOICE_NEAR_BEST
from pipelines.config import parse_config
from pipelines.engines import period_shares
from pipelines.engines.share_settings import ShareRule
from pipelines.engines.share_tuning import class_candidates
from pipelines.errors import ConfigError
from pipelines.schemas_selection import ShareTuning
from pipelines.stages import backtest_accuracy, share_tables

WEEKS = 160


def _mix_change(seed: int = 4, change_at: int = 146) -> np.ndarray:
    """(2 parents, 3 children, WEEKS): a steady parent; the children's mix swaps at week `change_at`."""
    rng = np.random.default_rng(seed)
    before, after = np.array([0.6, 0.3, 0.1]), np.array([0.1, 0.3, 0.6])
    mix = np.where(np.arange(WEEKS)[:, None] < change_at, before, after)  # (WEEKS, 3)
    parent = rng.poisson(300, (2, WEEKS)).astype(float)
    return np.round(parent[:, None, :] * mix.T[None, :, :] * rng.uniform(0.9, 1.1, (2, 3, WEEKS)))


def _inputs(y: np.ndarray):
    history, children, cycle = frames(y)
    history["shortage"] = False
    cleaned = history[["product", "site", "customer", "period_start"]].assign(raw_quantity=history["quantity"])
    products = pd.DataFrame({"product": sorted(children["product"].unique()), "product_class": "a",
                             "active_from": None, "active_to": None, "successor": None})
    spans = children[["product", "site", "customer"]].assign(
        active_from=None, active_to=None, reference_customer=None, scale=np.nan, initial_share=np.nan
    )
    calendar = pd.DataFrame({"cycle_date": [cycle], "history_periods": [WEEKS]})
    return history, cleaned, products, spans, calendar


def _config(window, method="pooled", max_gain=0.02):
    return parse_config({
        "product_classes": {"a": {"window": window, "method": method, "strategy": "top_down", "models": SES}},
        "calendar": {"horizon": 4},
        "backtest": {"origins": 3, "horizon": 4, "step": 4, "strategies": ["top_down", "bottom_up"]},
        "selection": {"share_tuning": {"windows": [4, 13, 52, 104], "methods": ["pooled", "mean_of_ratios"],
                                       "max_gain": max_gain}},
    })


def _backtest(y, config, previous=None):
    history, cleaned, products, spans, calendar = _inputs(y)
    return backtest_accuracy.run(
        history, cleaned, products, spans, calendar, backtest_accuracy.BacktestSettings.of(config),
        previous_tuning=previous,
    )


def test_candidates_keep_what_the_class_fixes_and_try_per_period_methods_at_one_window():
    rule = ShareRule(window=26, method="pooled", smoothing=0.2)
    methods = ("pooled", "smoothed", "seasonal")
    fixed_method = class_candidates(rule, True, False, (4, 13, 52), methods, 100)
    assert [(w, m) for w, m, own in fixed_method if own] == [(4, "pooled"), (13, "pooled"), (52, "pooled")]
    # the seasonal method's period shares do not depend on the window: tried once, at the longest candidate
    assert [(w, m) for w, m, _ in fixed_method if m == "seasonal"] == [(52, "seasonal")]
    both = class_candidates(ShareRule(window=0, method="auto", smoothing=0.2), True, True, (4, 13, 52), methods, 20)
    assert all(own for *_, own in both) and max(w for w, *_ in both) == 13  # 52 is longer than the 20 periods


def test_window_auto_follows_a_recent_change_of_mix_and_the_share_table_follows_the_choice():
    y = _mix_change()
    result = _backtest(y, _config("auto"))
    tuning = ShareTuning.validate(result.outputs["share_tuning"])
    own = tuning[tuning["own"]].set_index("window")
    assert set(own.index) == {4, 13, 52, 104} and (own["method"] == "pooled").all()
    chosen = tuning[tuning["chosen"]].iloc[0]
    assert chosen["window"] == 4 and chosen["decision"] == "first" and chosen["reason"] == "no_incumbent"
    assert own.loc[4, "score"] < own.loc[13, "score"] < own.loc[104, "score"]
    # the share table follows the backtest's choice
    history, _, products, spans, calendar = _inputs(y)
    settings = share_tables.ShareTableSettings.of(_config("auto"))
    shares = share_tables.run(history, products, spans, calendar, settings, share_tuning=tuning)
    assert set(shares.outputs["share_tables"]["window"]) == {4}
    # without the tuning an auto window is refused rather than guessed
    with pytest.raises(ValueError, match="window or method auto"):
        share_tables.run(history, products, spans, calendar, settings)


def test_an_auto_window_is_kept_next_cycle_unless_the_challenger_wins_clearly():
    y = _mix_change()
    previous = _backtest(y, _config("auto")).outputs["share_tuning"].copy()
    previous["chosen"] = previous["candidate"] == "pooled/13"  # last cycle followed 13 weeks
    tuning = _backtest(y, _config("auto"), previous=previous).outputs["share_tuning"]
    chosen = tuning[tuning["chosen"]].iloc[0]
    # 4 weeks score well over 1 % better than 13 after the change of mix: switch, and say why
    assert chosen["window"] == 4 and chosen["decision"] == "switch" and "13" in chosen["detail"]
    previous["chosen"] = previous["candidate"] == "pooled/4"
    again = _backtest(y, _config("auto"), previous=previous).outputs["share_tuning"]
    assert again[again["chosen"]].iloc[0]["decision"] == "keep"


def test_a_fixed_long_window_worse_than_the_best_fires_the_warning_and_a_higher_threshold_passes():
    y = _mix_change()
    result = _backtest(y, _config(104))
    rows = result.checks[SHARE_CHOICE_NEAR_BEST].rows
    assert len(rows) == 1 and rows.iloc[0]["window"] == 104 and rows.iloc[0]["gain"] > 0.02
    tuning = result.outputs["share_tuning"]
    assert tuning[tuning["chosen"]].iloc[0]["window"] == 104  # fixed: kept, only reported
    assert tuning[tuning["best"]].iloc[0]["window"] == 4
    quiet = _backtest(y, _config(104, max_gain=float(rows.iloc[0]["gain"]) + 0.01))
    assert quiet.checks[SHARE_CHOICE_NEAR_BEST].rows.empty


def _leaf_fit_config(method="pooled", setting=None, window=26):
    tuning = {"windows": [4, 26], "methods": ["pooled", "children_forecast"]}
    if setting is not None:
        tuning["leaf_fit_candidates"] = setting
    return parse_config({
        "product_classes": {"a": {"window": window, "method": method, "strategy": "top_down", "models": SES}},
        "calendar": {"horizon": 4},
        "backtest": {"origins": 3, "horizon": 4, "step": 4, "strategies": ["top_down"]},
        "selection": {"share_tuning": tuning},
    })


def _counting_leaf_fits(monkeypatch) -> list[int]:
    """Spy on the leaf model fits of the children_forecast shares: one entry (leaves fitted) per call."""
    calls: list[int] = []
    real = period_shares.children_forecasts

    def spy(history, children, *args, **kwargs):
        calls.append(len(children))
        return real(history, children, *args, **kwargs)

    monkeypatch.setattr(period_shares, "children_forecasts", spy)
    return calls


def test_a_fixed_class_leaves_out_the_leaf_fit_candidate_unless_always_or_configured(monkeypatch):
    y = _mix_change()
    fits = _counting_leaf_fits(monkeypatch)
    default = ShareTuning.validate(_backtest(y, _leaf_fit_config()).outputs["share_tuning"])
    assert fits == []  # no leaf model fitted for a fixed window and method
    assert set(default["candidate"]) == {"pooled/4", "pooled/26"}
    assert default["detail"].str.contains("left out children_forecast").all()
    assert default["detail"].str.contains("leaf_fit_candidates: always").all()

    always = ShareTuning.validate(_backtest(y, _leaf_fit_config(setting="always")).outputs["share_tuning"])
    assert len(fits) == 3 and all(n == 6 for n in fits)  # one fit of the 6 leaves at each of the 3 origins
    assert set(always["candidate"]) == {"pooled/4", "pooled/26", "children_forecast/26"}
    assert not always["detail"].str.contains("left out").any()
    # the candidates both score are scored alike; only the comparison with the whole grid may differ
    same = ["candidate", "score", "wmape", "rmsse", "mase", "configured", "own", "chosen"]
    kept = always[always["candidate"] != "children_forecast/26"].reset_index(drop=True)
    pd.testing.assert_frame_equal(kept[same], default[same])

    # a class configured with the method keeps it under the default, and fits its leaves
    fits.clear()
    own = _backtest(y, _leaf_fit_config(method="children_forecast")).outputs["share_tuning"]
    assert "children_forecast/26" in set(own["candidate"]) and len(fits) == 3
    assert not own["detail"].str.contains("left out").any()


def test_a_class_with_method_auto_still_tries_the_leaf_fit_candidate(monkeypatch):
    y = _mix_change()
    fits = _counting_leaf_fits(monkeypatch)
    default = _backtest(y, _leaf_fit_config(method="auto")).outputs["share_tuning"]
    assert "children_forecast/26" in set(default["candidate"]) and len(fits) == 3
    fits.clear()
    always = _backtest(y, _leaf_fit_config(method="auto", setting="always")).outputs["share_tuning"]
    pd.testing.assert_frame_equal(default, always)
    assert len(fits) == 3


def test_leaf_fit_candidates_is_validated():
    with pytest.raises(ConfigError, match="leaf_fit_candidates: Input should be 'auto_only' or 'always'"):
        _leaf_fit_config(setting="sometimes")


def test_in_a_run_of_two_classes_only_the_class_that_tries_it_fits_its_leaves(monkeypatch):
    y = _mix_change()
    history, cleaned, products, spans, calendar = _inputs(y)
    products["product_class"] = np.where(products["product"] == "P0", "a", "b")  # P0's 3 leaves fixed, P1's auto
    fits = _counting_leaf_fits(monkeypatch)

    def tuning(setting):
        classes = {"a": {"window": 26, "method": "pooled", "strategy": "top_down", "models": SES},
                   "b": {"window": 26, "method": "auto", "strategy": "top_down", "models": SES}}
        config = parse_config({
            "product_classes": classes, "calendar": {"horizon": 4},
            "backtest": {"origins": 3, "horizon": 4, "step": 4, "strategies": ["top_down"]},
            "selection": {"share_tuning": {"windows": [4, 26], "methods": ["pooled", "children_forecast"],
                                           "leaf_fit_candidates": setting}},
        })
        settings = backtest_accuracy.BacktestSettings.of(config)
        return backtest_accuracy.run(history, cleaned, products, spans, calendar, settings).outputs["share_tuning"]

    default = tuning("auto_only")
    assert fits == [3, 3, 3]  # class b's 3 leaves at each origin, not class a's
    assert "children_forecast/26" not in set(default.loc[default["product_class"] == "a", "candidate"])
    always = tuning("always")
    assert fits[3:] == [6, 6, 6]  # both classes try it
    b = ["product_class", "candidate", "score", "best", "chosen", "gain", "decision", "detail"]
    pd.testing.assert_frame_equal(default[default["product_class"] == "b"][b].reset_index(drop=True),
                                  always[always["product_class"] == "b"][b].reset_index(drop=True))
