"""RMSSE, MASE, their pooling and the metric by demand class (`pipelines.engines.scaled_errors`).

Outside references:
- utilsforecast 0.2.17 (`utilsforecast.losses.rmsse` and `mase`, Nixtla; installed with
  statsforecast and pinned in the test extra): an independent implementation of the M5
  measure (scale = in-sample mean squared seasonal-naive error) and of MASE, on seeded
  series of different lengths, for m = 1 and m = 4.
- The M5 definition (Makridakis, Spiliotis & Assimakopoulos 2022, IJF 38(4), eq. 1), worked
  by hand on a small example in `test_rmsse_of_a_hand_worked_m5_example`.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from utilsforecast.losses import mase as uf_mase
from utilsforecast.losses import rmsse as uf_rmsse

from pipelines.engines.scaled_errors import (
    MetricRule,
    class_metric,
    pooled_rmsse,
    rmsse,
    rmsse_scale,
    scaled_errors,
    volume_weights,
)


def test_rmsse_of_a_hand_worked_m5_example():
    # in-sample (from the first non-zero demand) 3, 0, 2, 5: one-step differences -3, 2, 3,
    # squares 9, 4, 9 -> q2 = 22 / 3; test actuals 4, 1, forecasts 2, 2: errors -2, 1, squares
    # 4, 1 -> mean 2.5; RMSSE = sqrt(2.5 / (22 / 3)) = sqrt(7.5 / 22) = 0.5838742...
    # MASE: q = (3 + 2 + 3) / 3 = 8 / 3, mean |e| = 1.5 -> 1.5 / (8 / 3) = 0.5625
    out = scaled_errors(
        np.zeros(4, dtype=np.int64), np.array([3.0, 0, 2, 5]), np.array([[4.0, 1]]), np.array([[2.0, 2]])
    )
    assert out.rmsse_scale[0] == pytest.approx(22 / 3)
    assert out.rmsse[0] == pytest.approx(np.sqrt(7.5 / 22), rel=1e-12)
    assert out.mase[0] == pytest.approx(0.5625, rel=1e-12)


def _panel(seed: int, n_series: int, h: int):
    rng = np.random.default_rng(seed)
    lengths = rng.integers(6, 40, n_series)
    series = np.repeat(np.arange(n_series), lengths)
    y = rng.poisson(rng.uniform(0.3, 20, n_series)[series]).astype(float)
    actual = rng.poisson(5, (n_series, h)).astype(float)
    forecast = rng.uniform(0, 10, (n_series, h))
    return lengths, series, y, actual, forecast


@pytest.mark.parametrize("m", [1, 4])
def test_rmsse_and_mase_equal_utilsforecast_per_series(m):
    lengths, series, y, actual, forecast = _panel(7, 25, 6)
    ds = np.arange(len(y)) - np.repeat(np.cumsum(lengths) - lengths, lengths)
    train = pd.DataFrame({"unique_id": series, "ds": ds, "y": y})
    test = pd.DataFrame(
        {
            "unique_id": np.repeat(np.arange(25), 6),
            "ds": np.repeat(lengths, 6) + np.tile(np.arange(6), 25),
            "y": actual.ravel(),
            "model": forecast.ravel(),
        }
    )
    ours = scaled_errors(series, y, actual, forecast, m=m)
    ref_rmsse = uf_rmsse(test, ["model"], m, train).sort_values("unique_id")["model"].to_numpy()
    ref_mase = uf_mase(test, ["model"], m, train).sort_values("unique_id")["model"].to_numpy()
    # a constant in-sample series has scale 0: we say NaN, utilsforecast divides by 0 (inf)
    finite = np.isfinite(ref_rmsse)
    np.testing.assert_allclose(ours.rmsse[finite], ref_rmsse[finite], rtol=1e-12)
    np.testing.assert_allclose(ours.mase[np.isfinite(ref_mase)], ref_mase[np.isfinite(ref_mase)], rtol=1e-12)
    assert np.isnan(ours.rmsse[~finite]).all()


def test_scale_needs_m_plus_one_rows_and_stays_inside_each_series():
    # series 0: 1, 2 (one difference: 1); series 1: 5 (no difference); series 2: 4, 4, 4 (constant: 0)
    q2 = rmsse_scale(np.array([0, 0, 1, 2, 2, 2]), np.array([1.0, 2, 5, 4, 4, 4]), 3, 1)
    assert q2[0] == 1.0 and np.isnan(q2[1]) and q2[2] == 0.0
    # the last row of series 0 and the first of series 1 are never differenced (5 - 2 would give 9)
    value = rmsse(np.array([[1.0], [1.0], [1.0]]), np.array([[2.0], [2.0], [2.0]]), q2)
    assert value[0] == 1.0 and np.isnan(value[1]) and np.isnan(value[2])


def test_volume_weights_are_the_last_window_of_each_series():
    # series 0: 1, 2, 3, 4 -> last 2 = 7; series 1: 10 -> 10; series 2 has no rows -> 0
    w = volume_weights(np.array([0, 0, 0, 0, 1]), np.array([1.0, 2, 3, 4, 10]), 3, window=2)
    assert w.tolist() == [7.0, 10.0, 0.0]


def test_pooled_rmsse_weights_by_volume_or_equally_and_skips_unscored_rows():
    # rows: RMSSE 1.0 (volume 30), 2.0 (volume 10), NaN (volume 100), 4.0 (volume 0)
    values = np.array([1.0, 2.0, np.nan, 4.0])
    volume = np.array([30.0, 10.0, 100.0, 0.0])
    # volume: (30 * 1 + 10 * 2) / 40 = 1.25; the NaN row and the zero-volume row are left out
    assert pooled_rmsse(values, "volume", volume)[0] == pytest.approx(1.25)
    # equal: (1 + 2 + 4) / 3
    assert pooled_rmsse(values, "equal")[0] == pytest.approx(7 / 3)
    # per group: group 0 = rows 0 and 2, group 1 = rows 1 and 3
    got = pooled_rmsse(values, "volume", volume, group=np.array([0, 1, 0, 1]), n_groups=3)
    assert got[0] == 1.0 and got[1] == 2.0 and np.isnan(got[2])
    with pytest.raises(ValueError, match="needs `volume`"):
        pooled_rmsse(values, "volume")
    with pytest.raises(ValueError, match="choose from"):
        pooled_rmsse(values, "dollars")


def test_metric_by_demand_class_follows_the_dominant_share():
    # class 0: 3 smooth, 1 lumpy -> wmape (3/4); class 1: 1 erratic, 2 intermittent -> rmsse (2/3);
    # class 2: only no_demand -> the smooth metric, share NaN
    code = np.array([0, 0, 0, 0, 1, 1, 1, 2])
    demand = np.array(["smooth", "smooth", "smooth", "lumpy", "erratic", "intermittent", "intermittent", "no_demand"])
    out = class_metric(code, demand, 3)
    assert out.metric.tolist() == ["wmape", "rmsse", "wmape"]
    assert out.share[0] == pytest.approx(0.75) and out.share[1] == pytest.approx(2 / 3) and np.isnan(out.share[2])
    # by volume the lumpy series of class 0 (volume 10 against 1 + 1 + 1) decides
    volume = np.array([1.0, 1, 1, 10, 1, 1, 1, 0])
    by_volume = class_metric(code, demand, 3, MetricRule(dominance="volume"), volume)
    assert by_volume.metric[0] == "rmsse" and by_volume.share[0] == pytest.approx(10 / 13)
    # configurable: everything by MASE
    everything = MetricRule(smooth="mase", erratic="mase", intermittent="mase", lumpy="mase")
    assert class_metric(code, demand, 3, everything).metric[:2].tolist() == ["mase", "mase"]
    with pytest.raises(ValueError, match="choose from"):
        MetricRule(lumpy="mape")


def test_wmape_rewards_a_zero_forecast_of_intermittent_demand_and_rmsse_does_not():
    # the reason for the rule: intermittent actuals 0, 0, 0, 6 (mean 1.5); forecast 0 vs the mean 1.5
    actual = np.array([[0.0, 0, 0, 6]])
    zero, mean = np.zeros((1, 4)), np.full((1, 4), 1.5)
    wmape = lambda f: np.abs(f - actual).sum() / actual.sum()  # noqa: E731
    assert wmape(zero) < wmape(mean)  # 1.0 < 1.5: WMAPE prefers the zero forecast
    q2 = np.array([4.0])
    assert rmsse(actual, mean, q2)[0] < rmsse(actual, zero, q2)[0]  # RMSSE prefers the mean
