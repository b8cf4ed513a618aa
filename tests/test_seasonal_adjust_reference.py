"""Seasonal adjustment of the outlier rules in `cleaned_history`, against outside references.

Outside reference:
- statsmodels 0.15.0 `statsmodels.tsa.seasonal.seasonal_decompose(x, model="additive", period=m)`:
  the classical additive decomposition (centred 2 x m moving-average trend, NaN at the ends;
  seasonal index = mean of the detrended values at each position of the season, centred to sum
  0). Our `seasonal_component` computes the same for many series at once and must give the same
  seasonal and trend components on every series without gaps. statsmodels refuses a series
  shorter than two full cycles; ours leaves such a series unadjusted.

Why the adjustment exists (the required case of issue 3): a clean seasonal series, with a
strong yearly peak and little noise, loses nothing under the rule once judged on x - s, while
the same rule on the raw series cuts its peaks.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels
from statsmodels.tsa.seasonal import seasonal_decompose

from pipelines.config import parse_config
from pipelines.engines.outliers import seasonal_component
from pipelines.stages.cleaned_history import clean_history


def _series(rng: np.random.Generator, n: int, m: int) -> np.ndarray:
    """Level + trend + a yearly shape + noise, positive (a made-up test series)."""
    t = np.arange(n)
    shape = 30.0 * np.exp(-0.5 * (((t % m) - m / 2) / (m / 10)) ** 2)
    return 50.0 + 0.1 * t + shape + rng.normal(0.0, 3.0, n)


@pytest.mark.parametrize(("m", "lengths"), [(52, (104, 130, 157)), (12, (24, 30, 41))])
def test_seasonal_and_trend_components_equal_statsmodels(m, lengths):
    rng = np.random.default_rng(2024)
    # several series of different lengths in one grid, starting at different columns (NaN before and
    # after each series, as in cleaned_history's grid), decomposed all at once
    width = max(lengths) + 2 * m
    grid = np.full((len(lengths), width), np.nan)
    series = []
    for i, n in enumerate(lengths):
        start = (7 * i + 3) % m
        x = _series(rng, n, m)
        grid[i, start : start + n] = x
        series.append((start, x))
    seasonal, adjusted, trend = seasonal_component(grid, m)
    assert adjusted.all()
    for i, (start, x) in enumerate(series):
        ref = seasonal_decompose(x, model="additive", period=m)  # reference: statsmodels 0.15.0
        np.testing.assert_allclose(seasonal[i, start : start + len(x)], ref.seasonal, rtol=0, atol=1e-9)
        np.testing.assert_allclose(trend[i, start : start + len(x)], ref.trend, rtol=0, atol=1e-9, equal_nan=True)
    assert statsmodels.__version__.startswith("0.")


def test_shorter_than_two_seasons_is_left_unadjusted_where_statsmodels_refuses():
    rng = np.random.default_rng(3)
    x = _series(rng, 2 * 12 - 1, 12)
    # reference: statsmodels 0.15.0 needs two complete cycles for period 12
    with pytest.raises(ValueError):
        seasonal_decompose(x, model="additive", period=12)
    seasonal, adjusted, _ = seasonal_component(x[None, :], 12)
    assert adjusted.tolist() == [False]
    assert (seasonal == 0).all()
    # with exactly two full seasons both decompose, and agree
    x = _series(rng, 24, 12)
    seasonal, adjusted, _ = seasonal_component(x[None, :], 12)
    assert adjusted.tolist() == [True]
    np.testing.assert_allclose(seasonal[0], seasonal_decompose(x, period=12).seasonal, atol=1e-9)


# ------------------------------------------------------------------ a clean seasonal series loses nothing
WEEKS = pd.date_range("2023-12-04", periods=156, freq="7D")  # three seasons of 52 weeks, Mondays
PRODUCTS = pd.DataFrame(
    {"product": ["P1"], "product_class": ["s"], "active_from": pd.NaT, "active_to": pd.NaT, "successor": None}
)
SPANS = pd.DataFrame(
    {
        "product": ["P1"],
        "site": ["S1"],
        "customer": ["C1"],
        "active_from": pd.NaT,
        "active_to": pd.NaT,
        "reference_customer": None,
    }
)


def _clean_seasonal_raw(seed: int) -> tuple[pd.DataFrame, np.ndarray]:
    """Weekly 20 + 0.05 t, a yearly peak of +200 (sd 1.5 weeks) in week 28 of each season, noise sd 1, whole units."""
    rng = np.random.default_rng(seed)
    t = np.arange(len(WEEKS))
    x = np.round(20 + 0.05 * t + 200 * np.exp(-0.5 * (((t % 52) - 28) / 1.5) ** 2) + rng.normal(0.0, 1.0, len(t)))
    raw = pd.DataFrame(
        {
            "source_file": "history.csv",
            "source_row": t + 1,
            "product": "P1",
            "site": "S1",
            "customer": "C1",
            "period_start": [d.date().isoformat() for d in WEEKS],
            "quantity": [str(int(v)) for v in x],
        }
    )
    return raw, x


# the bundled rules of config/planning.yaml (cleansing default and the seasonal class)
BUNDLED_RULES = [{"rule": "hampel", "window": 25, "k": 5.0}, {"rule": "tukey", "window": 25, "fence": 3.0}]


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("rule", BUNDLED_RULES, ids=["hampel", "tukey"])
def test_clean_seasonal_series_loses_nothing_when_adjusted_and_its_peaks_are_cut_when_not(rule, seed):
    raw, x = _clean_seasonal_raw(seed)

    def run(adjust: str, seasonal_class: bool = True):
        config = parse_config(
            {
                "product_classes": {"s": {"window": 52, "models": {"seasonal": seasonal_class}}},
                "cleansing": {"outliers": rule | {"seasonal_adjust": adjust}},
            }
        )
        return clean_history(raw, PRODUCTS, SPANS, config)

    adjusted = run("auto")
    # judged on x - s the series is a line plus noise of sd 1: no correction row, nothing changed
    # (checked for 40 seeds when this test was written; three run here)
    assert adjusted.corrections.empty
    np.testing.assert_array_equal(adjusted.cleaned.sort_values("period_start")["quantity"].to_numpy(), x)
    assert adjusted.outlier_rules["seasonal_series"].tolist() == [1]

    # the same rule on the raw series cuts the peaks: a 25-week window around a peak is mostly
    # off-season weeks near 20-30, so the peak weeks (about +200) lie far above its median and quartiles
    for unadjusted in (run("off"), run("auto", seasonal_class=False)):
        cut = unadjusted.corrections
        assert len(cut) >= 3
        weeks_of_season = ((pd.DatetimeIndex(cut["period_start"]) - WEEKS[0]).days // 7) % 52
        assert set(weeks_of_season) <= set(range(24, 33))  # all at the peak (week 28 +/- 4)
        assert {0, 1, 2} <= set(((pd.DatetimeIndex(cut["period_start"]) - WEEKS[0]).days // 7) // 52)  # in every season
        assert (cut["delta"] < 0).all()
