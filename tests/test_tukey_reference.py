"""Tukey's fences in `cleaned_history` checked against outside references.

Outside references:
- numpy 2.4.6 `numpy.percentile(w, q)` with its default method "linear": the quartiles of one
  window, Hyndman & Fan (1996) definition 7 (h = (n - 1) p, linear between order statistics).
- pandas 2.3.3 `Series.rolling(window, center=True, min_periods=1).quantile(p, interpolation="linear")`:
  the same quartiles over a centred window that skips NaN and is truncated at the ends, which is
  what `tukey` documents.
- scipy 1.17.1 `scipy.stats.iqr(w, interpolation="linear")`: the interquartile range.
- Tukey (1977), Exploratory Data Analysis: values beyond Q1 - 1.5 IQR or Q3 + 1.5 IQR ("inner
  fences") are outside, beyond 3 IQR ("outer fences") far out (recalled from memory). Tukey
  computed the quartiles as hinges; we use type-7 quartiles (the numpy and pandas default), so
  the fences can differ from hinge-based fences in small windows: a documented project choice.

The published rule is symmetric (`sides: both`); `sides: upper` is the same rule restricted to
values above the upper fence, as for Hampel (see test_hampel_reference.py).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import scipy
import scipy.stats
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from pipelines.config_sections import OutlierConfig
from pipelines.engines.outliers import tukey, tukey_fences, tukey_limits


def pandas_quartiles(x: np.ndarray, window: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Reference: pandas 2.3.3 rolling quantile, linear interpolation, centred, min_periods=1."""
    r = pd.Series(x, dtype=float).rolling(window, center=True, min_periods=1)
    return tuple(r.quantile(p, interpolation="linear").to_numpy() for p in (0.25, 0.5, 0.75))


def window_values(x: np.ndarray, t: int, window: int) -> np.ndarray:
    half = window // 2
    w = x[max(0, t - half) : t + half + 1]
    return w[~np.isnan(w)]


@pytest.mark.parametrize("window", [3, 5, 7, 13, 25])
def test_rolling_quartiles_equal_pandas_rolling_quantile(window):
    rng = np.random.default_rng(11)
    m = rng.gamma(2.0, 10.0, size=(6, 40))
    m[rng.random(m.shape) < 0.15] = np.nan  # periods without a value
    m[1] = np.round(m[1])  # ties
    m[2, 10:32] = np.nan  # a gap of 22 periods: longer than windows up to 21
    m[3, :5] = np.nan
    q1, med, q3 = tukey(m, window)
    for i in range(len(m)):
        r1, r2, r3 = pandas_quartiles(m[i], window)  # reference: pandas 2.3.3
        np.testing.assert_allclose(q1[i], r1, rtol=1e-12, atol=1e-12, equal_nan=True)
        np.testing.assert_allclose(med[i], r2, rtol=1e-12, atol=1e-12, equal_nan=True)
        np.testing.assert_allclose(q3[i], r3, rtol=1e-12, atol=1e-12, equal_nan=True)
    if window <= 21:
        assert np.isnan(q1[2, 21])  # the middle of the long gap has no value in its window


def test_rolling_quartiles_and_iqr_equal_numpy_percentile_and_scipy_iqr():
    rng = np.random.default_rng(5)
    x = rng.poisson(30, size=31).astype(float)
    x[[4, 19]] = np.nan
    window = 7
    q1, med, q3 = tukey(x[None, :], window)
    for t in range(len(x)):
        w = window_values(x, t, window)
        # reference: numpy 2.4.6 numpy.percentile, default method "linear" (Hyndman & Fan type 7)
        ref = np.percentile(w, [25, 50, 75])
        np.testing.assert_allclose([q1[0, t], med[0, t], q3[0, t]], ref, rtol=1e-12)
        # reference: scipy 1.17.1 scipy.stats.iqr with linear interpolation
        assert q3[0, t] - q1[0, t] == pytest.approx(scipy.stats.iqr(w, interpolation="linear"), rel=1e-12, abs=1e-12)
    assert scipy.__version__.startswith("1.") and np.__version__.startswith("2.")


@settings(max_examples=60, deadline=None)
@given(
    x=arrays(
        np.float64,
        st.integers(1, 40),
        elements=st.one_of(st.floats(0, 1e6, allow_nan=False), st.just(np.nan), st.sampled_from([0.0, 1.0, 5.0])),
    ),
    window=st.sampled_from([3, 5, 7, 9, 13]),
)
def test_rolling_quartiles_equal_pandas_property(x, window):
    q1, med, q3 = tukey(x[None, :], window)
    r1, r2, r3 = pandas_quartiles(x, window)  # reference: pandas 2.3.3 rolling quantile
    for ours, ref in ((q1, r1), (med, r2), (q3, r3)):
        np.testing.assert_allclose(ours[0], ref, rtol=1e-9, atol=1e-6, equal_nan=True)


@pytest.mark.parametrize("fence", [1.5, 3.0])
@pytest.mark.parametrize("sides", ["both", "upper"])
@pytest.mark.parametrize("replace_with", ["limit", "median"])
def test_fences_flags_and_replacements_equal_numpy_percentile_rule(fence, sides, replace_with):
    rng = np.random.default_rng(8)
    x = rng.normal(50.0, 5.0, size=60)
    x[[6, 25, 41, 55]] = [130.0, 3.0, 95.0, 11.0]  # far outside any fence
    window = 9
    rule = OutlierConfig(rule="tukey", window=window, fence=fence, replace_with=replace_with, sides=sides)
    q1, med, q3 = tukey(x[None, :], window)
    flagged, replacement = tukey_limits(x[None, :], q1, med, q3, rule)
    ref_flag = np.zeros(len(x), dtype=bool)
    ref_repl = np.zeros(len(x))
    for t in range(len(x)):
        w = window_values(x, t, window)
        a, m, b = np.percentile(w, [25, 50, 75])  # reference: numpy 2.4.6, method "linear"
        lo, hi = a - fence * (b - a), b + fence * (b - a)  # Tukey (1977) fences
        ref_flag[t] = x[t] > hi or (sides == "both" and x[t] < lo)
        ref_repl[t] = m if replace_with == "median" else (hi if x[t] > hi else lo)
    # no value sits within 1e-6 of a fence, so float rounding decides nothing here
    lower, upper = tukey_fences(q1[0], q3[0], fence)
    assert np.minimum(np.abs(x - lower), np.abs(x - upper)).min() > 1e-6
    np.testing.assert_array_equal(flagged[0], ref_flag)
    assert set(np.flatnonzero(ref_flag)) >= ({6, 25, 41, 55} if sides == "both" else {6, 41})
    assert not (set(np.flatnonzero(flagged[0])) & ({25, 55} if sides == "upper" else set()))
    np.testing.assert_allclose(replacement[0][ref_flag], np.clip(ref_repl[ref_flag], 0, None), rtol=1e-12)


def test_replacement_is_never_below_zero():
    # sides both, a low outlier whose lower fence is negative: the limit is clipped at 0
    x = np.array([[30.0, 2.0, 31.0, 0.0, 29.0, 60.0, 28.0]])
    rule = OutlierConfig(rule="tukey", window=7, fence=1.5, sides="both")
    q1, med, q3 = tukey(x, 7)
    flagged, replacement = tukey_limits(x, q1, med, q3, rule)
    # week 3 (0): window weeks 0-6 sorted 0, 2, 28, 29, 30, 31, 60 -> Q1 at h = 1.5: 15, Q3 at 4.5: 30.5,
    # IQR 15.5, lower fence 15 - 23.25 = -8.25 < 0: not flagged. Reference numpy.percentile agrees:
    assert np.percentile([0, 2, 28, 29, 30, 31, 60], [25, 75]).tolist() == [15.0, 30.5]  # numpy 2.4.6
    assert not flagged[0, 3]
    assert (replacement >= 0).all()
