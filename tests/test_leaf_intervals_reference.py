"""Leaf intervals of split strategies, normal bounds and coverage (`pipelines.engines.leaf_intervals`).

Outside references:
- hierarchicalforecast 1.5.3 `TopDown(method="average_proportions")` with
  `intervals_method="normality"`: with fixed proportions its leaf standard deviation is the
  proportion x the parent's, so its leaf quantiles are our split bounds (to 1e-9).
- statsforecast 2.1.1 `AutoETS` intervals (level 80 and 95) of a parent: `sd_from_interval` must
  recover one standard deviation from both levels, and `normal_bounds` rebuild the library's bounds.
- utilsforecast 0.2.17 `utilsforecast.losses.coverage`: coverage per series, bounds included.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hierarchicalforecast.methods import TopDown
from statsforecast import StatsForecast
from statsforecast import models as sfm
from utilsforecast.losses import coverage as uf_coverage

from pipelines.engines.leaf_intervals import (
    interval_coverage,
    normal_bounds,
    sd_from_interval,
    split_interval,
    split_weights,
)


def test_split_bounds_equal_hierarchicalforecast_top_down_with_fixed_proportions():
    rng = np.random.default_rng(2)
    n, t, h = 4, 30, 3
    leaf_y = rng.uniform(5, 50, (n, t))
    s = np.vstack([np.ones((1, n)), np.eye(n)])
    y_in = s @ leaf_y
    parent_fc = rng.uniform(80, 120, (1, h))
    base = np.vstack([parent_fc, rng.uniform(10, 30, (n, h))])
    sigma = rng.uniform(5, 10, (n + 1, h))
    ref = TopDown(method="average_proportions").fit_predict(
        S=s,
        y_hat=base,
        tags={"parent": np.array([0]), "parent/leaf": np.arange(1, n + 1)},
        y_insample=y_in,
        sigmah=sigma,
        level=[80],
        intervals_method="normality",
    )
    # average proportions: mean over periods of each leaf's share of the parent (Gross & Sohl 1990, method A)
    prop = (leaf_y / leaf_y.sum(axis=0)).mean(axis=1)
    weights = np.repeat(prop[:, None], h, axis=1)
    np.testing.assert_allclose(ref["mean"][1:], weights * parent_fc, rtol=1e-9)
    lo, hi = normal_bounds(parent_fc, sigma[:1], [80])
    leaf_lo, leaf_hi = split_interval(lo, hi, weights, np.zeros(n, dtype=np.int64))
    # library quantiles 0.1 and 0.9 of the leaves
    np.testing.assert_allclose(leaf_lo[0], ref["quantiles"][1:, :, 0], rtol=1e-9)
    np.testing.assert_allclose(leaf_hi[0], ref["quantiles"][1:, :, 1], rtol=1e-9)
    # comonotone leaves: their bounds add up to the parent's
    np.testing.assert_allclose(leaf_hi[0].sum(axis=0), hi[0, 0], rtol=1e-12)


def test_split_weights_follow_the_cycles_split_rule_with_fallback():
    # parent 0: basis 1, 3 -> 0.25, 0.75; parent 1 in period 1: basis 0, 0 -> fallback 2, 2 -> 0.5, 0.5
    basis = np.array([[1.0, 1], [3, 3], [0, 0], [5, 0]])
    fallback = np.array([[1.0, 1], [1, 1], [2, 2], [6, 2]])
    w, used = split_weights(basis, np.array([0, 0, 1, 1]), 2, fallback)
    np.testing.assert_allclose(w, [[0.25, 0.25], [0.75, 0.75], [0, 0.5], [1, 0.5]])
    assert used[:, 1].tolist() == [False, False, True, True]
    with pytest.raises(ValueError, match=">= 0"):
        split_interval(np.zeros((1, 2)), np.ones((1, 2)), -w, np.array([0, 0, 1, 1]))


def test_sd_from_statsforecast_intervals_and_normal_bounds_rebuild_them():
    rng = np.random.default_rng(4)
    y = 100 + np.cumsum(rng.normal(0, 3, 80))
    df = pd.DataFrame({"unique_id": 0, "ds": np.arange(80), "y": y})
    fc = StatsForecast(models=[sfm.AutoETS(model="ANN")], freq=1, n_jobs=1).forecast(df=df, h=6, level=[80, 95])
    mean = fc["AutoETS"].to_numpy()
    sd80 = sd_from_interval(fc["AutoETS-lo-80"].to_numpy(), fc["AutoETS-hi-80"].to_numpy(), 80)
    sd95 = sd_from_interval(fc["AutoETS-lo-95"].to_numpy(), fc["AutoETS-hi-95"].to_numpy(), 95)
    np.testing.assert_allclose(sd80, sd95, rtol=1e-6)  # one normal distribution behind both levels
    lo, hi = normal_bounds(mean, sd80, [80, 95])
    np.testing.assert_allclose(lo[1], fc["AutoETS-lo-95"].to_numpy(), rtol=1e-6)
    np.testing.assert_allclose(hi[0], fc["AutoETS-hi-80"].to_numpy(), rtol=1e-6)
    with pytest.raises(ValueError, match="between 0 and 100"):
        normal_bounds(mean, sd80, [0.8, 100])


def test_coverage_equals_utilsforecast_and_counts_bounds_as_inside():
    rng = np.random.default_rng(6)
    n, h = 7, 10
    actual = rng.integers(0, 20, (n, h)).astype(float)
    lower = actual - rng.integers(-2, 3, (n, h))  # some bounds equal to the actual, some past it
    upper = lower + rng.integers(0, 5, (n, h))
    ours = interval_coverage(actual, lower, upper, np.arange(n), n)
    df = pd.DataFrame(
        {
            "unique_id": np.repeat(np.arange(n), h),
            "y": actual.ravel(),
            "m-lo-80": lower.ravel(),
            "m-hi-80": upper.ravel(),
        }
    )
    ref = uf_coverage(df, ["m"], 80).sort_values("unique_id")["m"].to_numpy()
    np.testing.assert_allclose(ours.coverage, ref, rtol=1e-12)
    # hand-worked: actuals 1, 2, 3, 4 against [1, 3]: 1, 2, 3 inside (bounds count), 4 above
    one = interval_coverage(np.array([1.0, 2, 3, 4]), np.ones(4), np.full(4, 3.0))
    assert one.coverage[0] == 0.75 and one.above[0] == 0.25 and one.below[0] == 0 and one.mean_width[0] == 2
