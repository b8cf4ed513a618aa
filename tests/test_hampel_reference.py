"""The Hampel / MAD outlier rule of `cleaned_history` checked against outside references.

Outside references:
- pandas 2.3.3 `Series.rolling(window, center=True, min_periods=1).median()` and
  `.rolling(...).apply(lambda w: median(|w - median(w)|))` for the rolling centred median and
  MAD (both skip NaN and truncate the window at the edges, as `hampel` documents).
- scipy 1.17.1 `scipy.stats.median_abs_deviation(x, scale="normal")`: the MAD divided by
  Phi^-1(3/4) = 0.6744897..., i.e. times 1.482602218..., the constant our MAD_SCALE = 1.4826 rounds.
- Leys, Ley, Klein, Bernard & Licata (2013), "Detecting outliers: Do not use standard deviation
  around the mean, use absolute deviation around the median", Journal of Experimental Social
  Psychology 49(4): MAD x 1.4826 under normality (b = 1 / Q(0.75)); rejection thresholds
  3 ("very conservative"), 2.5 ("moderately conservative"), 2 ("poorly conservative").
  The three thresholds and their labels are recalled from memory; the "multiply by 1.4826 if
  normality is assumed" step is as summarised in a public abstract page of the paper.
- Hampel (1974), J. Amer. Statist. Assoc. 69: the filter x_t flagged when
  |x_t - m_t| > k * 1.4826 * MAD_t in a moving window (recalled from memory).

The published rule is symmetric (`sides: both` in our config). Our default, `sides: upper`,
is a documented project choice (cleaned_history.py: low shipment weeks are kept as supply
gaps); the tests check `both` against the published rule and `upper` against the same rule
restricted to values above the window median.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import scipy
import scipy.stats
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from pipelines.config import parse_config
from pipelines.config_sections import OutlierConfig
from pipelines.engines.outliers import MAD_SCALE, hampel, hampel_limits
from pipelines.schemas import CleanedHistory, CustomerSpans, HistoryCorrections, Products, RawHistory
from pipelines.stages.cleaned_history import clean_history

WEEKS = pd.date_range("2026-01-05", periods=15, freq="7D")  # Mondays


# ------------------------------------------------------------------ references
def pandas_rolling(x: np.ndarray, window: int) -> tuple[np.ndarray, np.ndarray]:
    """Reference rolling centred median and MAD: pandas 2.3.3 Series.rolling(center=True, min_periods=1)."""
    r = pd.Series(x, dtype=float).rolling(window, center=True, min_periods=1)
    med = r.median().to_numpy()
    mad = r.apply(lambda w: np.nanmedian(np.abs(w - np.nanmedian(w))), raw=True).to_numpy()
    return med, mad


def window_values(x: np.ndarray, t: int, window: int) -> np.ndarray:
    half = window // 2
    w = x[max(0, t - half) : t + half + 1]
    return w[~np.isnan(w)]


# ------------------------------------------------------------------ rolling median and MAD
@pytest.mark.parametrize("window", [3, 5, 7, 13])
def test_rolling_median_and_mad_equal_pandas(window):
    rng = np.random.default_rng(42)
    m = rng.gamma(2.0, 10.0, size=(6, 30))
    m[rng.random(m.shape) < 0.15] = np.nan  # no value in some periods
    m[1, :] = np.round(m[1, :])  # ties
    m[2, 10:25] = np.nan  # a gap longer than the window: all-NaN windows
    m[3, :4] = np.nan
    med, mad = hampel(m, window, 3.0)
    for i in range(m.shape[0]):
        ref_med, ref_mad = pandas_rolling(m[i], window)  # reference: pandas 2.3.3 rolling
        np.testing.assert_allclose(med[i], ref_med, rtol=0, atol=1e-12, equal_nan=True)
        np.testing.assert_allclose(mad[i], ref_mad, rtol=0, atol=1e-12, equal_nan=True)
    assert np.isnan(med[2, 17])  # the middle of the long gap has no value in its window


def test_series_shorter_than_window_equals_pandas():
    x = np.array([[4.0, 9.0], [np.nan, 3.0]])
    med, mad = hampel(x, 7, 3.0)
    for i in range(2):
        ref_med, ref_mad = pandas_rolling(x[i], 7)  # reference: pandas 2.3.3 rolling
        np.testing.assert_allclose(med[i], ref_med, atol=1e-12, equal_nan=True)
        np.testing.assert_allclose(mad[i], ref_mad, atol=1e-12, equal_nan=True)


@settings(max_examples=60, deadline=None)
@given(
    x=arrays(
        np.float64,
        st.integers(1, 40),
        elements=st.one_of(st.floats(0, 1e6, allow_nan=False), st.just(np.nan), st.sampled_from([0.0, 1.0, 5.0])),
    ),
    window=st.sampled_from([3, 5, 7, 9, 13]),
)
def test_rolling_median_and_mad_equal_pandas_property(x, window):
    med, mad = hampel(x[None, :], window, 3.0)
    ref_med, ref_mad = pandas_rolling(x, window)  # reference: pandas 2.3.3 rolling
    np.testing.assert_allclose(med[0], ref_med, rtol=1e-12, atol=1e-9, equal_nan=True)
    np.testing.assert_allclose(mad[0], ref_mad, rtol=1e-12, atol=1e-9, equal_nan=True)


def test_mad_scale_and_scaled_mad_equal_scipy():
    # reference: scipy 1.17.1 scipy.stats.norm.ppf: 1 / Phi^-1(3/4) = 1.482602218...
    assert MAD_SCALE == pytest.approx(1.0 / scipy.stats.norm.ppf(0.75), rel=2e-6)
    rng = np.random.default_rng(7)
    x = rng.normal(100.0, 15.0, size=25)
    x[[3, 17]] = np.nan
    window = 7
    med, mad = hampel(x[None, :], window, 3.0)
    for t in range(len(x)):
        w = window_values(x, t, window)
        # reference: scipy 1.17.1 scipy.stats.median_abs_deviation (unscaled, then scale="normal")
        assert mad[0, t] == pytest.approx(scipy.stats.median_abs_deviation(w), abs=1e-12)
        assert MAD_SCALE * mad[0, t] == pytest.approx(scipy.stats.median_abs_deviation(w, scale="normal"), rel=2e-6)
        assert med[0, t] == pytest.approx(np.median(w), abs=1e-12)
    assert scipy.__version__.startswith("1.")


@pytest.mark.parametrize("sides", ["both", "upper"])
@pytest.mark.parametrize("replace_with", ["limit", "median"])
def test_hampel_limits_equal_scipy_scaled_mad_rule(replace_with, sides):
    rng = np.random.default_rng(3)
    x = rng.normal(50.0, 5.0, size=40)
    x[[5, 20, 33]] = [120.0, 2.0, 95.0]  # clear outliers, far from any limit
    rule = OutlierConfig(window=7, k=3.0, replace_with=replace_with, sides=sides)
    med, mad = hampel(x[None, :], 7, 3.0)
    flagged, replacement = hampel_limits(x[None, :], med, mad, rule)
    ref_flag = np.zeros(len(x), dtype=bool)
    ref_repl = np.zeros(len(x))
    for t in range(len(x)):
        w = window_values(x, t, 7)
        m = np.median(w)
        s = 3.0 * scipy.stats.median_abs_deviation(w, scale="normal")  # reference: scipy 1.17.1
        ref_flag[t] = abs(x[t] - m) > s if sides == "both" else x[t] - m > s  # "upper": spikes only
        ref_repl[t] = m if replace_with == "median" else (m + s if x[t] > m else m - s)
    # the rounding 1.4826 vs 1.4826022 must not sit on a decision here
    margin = np.abs(np.abs(x - med[0]) - 3.0 * MAD_SCALE * mad[0])
    assert margin.min() > 1e-3
    np.testing.assert_array_equal(flagged[0], ref_flag)
    assert set(np.flatnonzero(ref_flag)) >= ({5, 20, 33} if sides == "both" else {5, 33})
    assert (20 in np.flatnonzero(flagged[0])) == (sides == "both")  # the low outlier
    np.testing.assert_allclose(replacement[0][ref_flag], np.clip(ref_repl[ref_flag], 0, None), rtol=2e-6)


# ------------------------------------------------------------------ worked example through clean_history
# Hand-worked (our own arithmetic, checked against pandas above), window 7, k = 3:
#
#   week  0   1   2   3   4   5   6   7   8   9  10  11  12  13  14
#   x    10  12  11  13  12  50  11  12  10  13  11  12  10  11  12
#
#   week 5, window weeks 2..8:  11 13 12 50 11 12 10
#     sorted 10 11 11 12 12 13 50               -> median m = 12
#     |x - 12| = 1 1 0 38 1 0 2, sorted 0 0 1 1 1 2 38 -> MAD = 1
#     scaled MAD = 1.4826 x 1 (Leys et al. 2013); k = 3 -> spread 4.4478
#     limits 12 - 4.4478 = 7.5522 and 12 + 4.4478 = 16.4478; 50 > 16.4478 -> capped at 16.4478
#     (|50 - 12| / 1.4826 = 25.6 scaled MADs: an outlier at 3, 2.5 and 2 alike)
#   week 12, window truncated at the end to weeks 9..14:  13 11 12 10 11 12
#     sorted 10 11 11 12 12 13 -> median 11.5; |x - 11.5| = 1.5 .5 .5 1.5 .5 .5 -> MAD 0.5
#     |10 - 11.5| / (1.4826 x 0.5) = 2.02 scaled MADs: kept at k = 3 and 2.5,
#     flagged at k = 2 ("poorly conservative"), capped at 11.5 - 2 x 1.4826 x 0.5 = 10.0174
#   every other week lies within 1.35 scaled MADs of its window median.
HAND_SERIES = [10, 12, 11, 13, 12, 50, 11, 12, 10, 13, 11, 12, 10, 11, 12]


def _inputs(quantities: dict[int, str]):
    rows = [
        ("h.csv", i + 1, "P1", "S1", "C1", (WEEKS[w] + pd.Timedelta(days=2)).date().isoformat(), q)
        for i, (w, q) in enumerate(sorted(quantities.items()))
    ]
    raw = RawHistory.validate(
        pd.DataFrame(
            rows, columns=["source_file", "source_row", "product", "site", "customer", "period_start", "quantity"]
        )
    )
    products = Products.validate(
        pd.DataFrame(
            {"product": ["P1"], "product_class": ["a"], "active_from": [None], "active_to": [None], "successor": [None]}
        )
    )
    spans = CustomerSpans.validate(
        pd.DataFrame(
            [("P1", "S1", "C1", None, None, None)],
            columns=["product", "site", "customer", "active_from", "active_to", "reference_customer"],
        )
    )
    return raw, products, spans


def _config(k: float, replace_with: str = "limit", sides: str | None = None):
    outliers = {"window": 7, "k": k, "replace_with": replace_with} | ({"sides": sides} if sides else {})
    return parse_config(
        {
            "calendar": {"horizon": 4},
            "cleansing": {"outliers": outliers},
            "product_classes": {"a": {"window": 8, "method": "pooled"}},
        }
    )


# (k, {week: value after}) from the hand-worked example above (1.4826 from Leys et al. 2013),
# for the symmetric published rule (sides: both)
HAND_EXPECTED = {
    3.0: {5: 12 + 3 * 1.4826},  # Leys et al. 2013: 3 = "very conservative" (recalled from memory)
    2.5: {5: 12 + 2.5 * 1.4826},  # Leys et al. 2013: 2.5 = "moderately conservative" (recalled from memory)
    2.0: {5: 12 + 2 * 1.4826, 12: 11.5 - 2 * 1.4826 * 0.5},  # 2 = "poorly conservative" (recalled from memory)
}


@pytest.mark.parametrize("sides", [None, "upper", "both"])  # None = the config default (upper)
@pytest.mark.parametrize("k", sorted(HAND_EXPECTED))
def test_spike_capped_at_upper_limit_and_nothing_else_changes(k, sides):
    raw, products, spans = _inputs({w: str(v) for w, v in enumerate(HAND_SERIES)})
    res = clean_history(raw, products, spans, _config(k, sides=sides))
    # spikes only unless both sides: the low week 12 at k = 2 is then kept
    changes = HAND_EXPECTED[k] if sides == "both" else {5: HAND_EXPECTED[k][5]}
    CleanedHistory.validate(res.cleaned)
    HistoryCorrections.validate(res.corrections)
    assert res.cycle_date == WEEKS[-1] + pd.Timedelta(days=7)
    cleaned = res.cleaned.sort_values("period_start").reset_index(drop=True)
    assert list(pd.DatetimeIndex(cleaned["period_start"])) == list(WEEKS)

    expected = np.array(HAND_SERIES, dtype=float)
    for week, after in changes.items():
        expected[week] = after
    np.testing.assert_allclose(cleaned["quantity"].to_numpy(), expected, rtol=0, atol=1e-9)
    np.testing.assert_array_equal(cleaned["raw_quantity"].to_numpy(), np.array(HAND_SERIES, dtype=float))
    assert cleaned["corrected"].to_numpy().nonzero()[0].tolist() == sorted(changes)

    # pandas reference agrees on which weeks are flagged (pandas 2.3.3 rolling median / MAD)
    ref_med, ref_mad = pandas_rolling(np.array(HAND_SERIES, dtype=float), 7)
    deviation = np.array(HAND_SERIES) - ref_med
    ref_flag = (np.abs(deviation) if sides == "both" else deviation) > k * MAD_SCALE * ref_mad
    assert np.flatnonzero(ref_flag).tolist() == sorted(changes)

    corr = res.corrections
    assert (corr["rule"] == "hampel_cap").all()
    assert len(corr) == len(changes)
    spike = corr[pd.DatetimeIndex(corr["period_start"]) == WEEKS[5]].iloc[0]
    assert (spike["product"], spike["site"], spike["customer"]) == ("P1", "S1", "C1")
    assert spike["before"] == 50.0
    assert spike["after"] == pytest.approx(12 + k * 1.4826, abs=1e-9)
    assert spike["delta"] == pytest.approx(12 + k * 1.4826 - 50, abs=1e-9)
    params = json.loads(spike["parameters"])
    assert params["window"] == 7 and params["k"] == k and params["replace_with"] == "limit"
    assert params["sides"] == (sides or "upper")
    assert params["median"] == pytest.approx(12.0)
    assert params["limit_scale"] == pytest.approx(k * 1.4826, abs=1e-6)
    # per series: sum(raw) + sum(delta) = sum(cleaned)
    assert cleaned["raw_quantity"].sum() + corr["delta"].sum() == pytest.approx(cleaned["quantity"].sum(), abs=1e-9)


def test_spike_replaced_by_median_when_configured():
    raw, products, spans = _inputs({w: str(v) for w, v in enumerate(HAND_SERIES)})
    res = clean_history(raw, products, spans, _config(3.0, replace_with="median"))
    cleaned = res.cleaned.sort_values("period_start")
    expected = np.array(HAND_SERIES, dtype=float)
    expected[5] = 12.0  # the window median, worked by hand above
    np.testing.assert_allclose(cleaned["quantity"].to_numpy(), expected, atol=1e-12)
    assert res.corrections[["before", "after", "delta"]].to_numpy().tolist() == [[50.0, 12.0, -38.0]]


def test_intermittent_series_with_zero_mad_keeps_its_spikes():
    """Documented rule in cleaned_history.py: where MAD_t = 0 nothing is flagged."""
    spikes = {3: 9.0, 8: 7.0, 14: 8.0}
    quantities = {0: "0"} | {w: str(v) for w, v in spikes.items()}  # other weeks have no line: filled with 0
    raw, products, spans = _inputs(quantities)
    res = clean_history(raw, products, spans, _config(3.0))
    cleaned = res.cleaned.sort_values("period_start").reset_index(drop=True)
    series = np.zeros(15)
    for w, v in spikes.items():
        series[w] = v
    np.testing.assert_array_equal(cleaned["quantity"].to_numpy(), series)
    assert not cleaned["corrected"].any()
    assert not (res.corrections["rule"] == "hampel_cap").any()
    assert cleaned["filled"].sum() == 15 - 1 - len(spikes)

    # reference (pandas 2.3.3 rolling): every spike sits in a window whose median and MAD are 0,
    # so the textbook rule |x - m| > k * 1.4826 * MAD, without the MAD = 0 exception, would flag them
    ref_med, ref_mad = pandas_rolling(series, 7)
    for w in spikes:
        assert ref_med[w] == 0.0 and ref_mad[w] == 0.0
    naive = np.abs(series - ref_med) > 3.0 * MAD_SCALE * ref_mad
    assert set(np.flatnonzero(naive)) == set(spikes)
