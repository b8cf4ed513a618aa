"""The Diebold-Mariano test (HLN-corrected) and the keep-the-incumbent rule (`pipelines.engines.forecast_comparison`).

Outside references:
- dieboldmariano 1.1.0 (PyPI, E. Annunziata; pinned in the test extra): an independent pure-Python
  implementation of the DM test with the Harvey, Leybourne & Newbold (1997) correction, the
  "acf" and "bartlett" long-run variance estimators and its own Student-t tail (a regularised
  incomplete beta function, no scipy). Statistic and p-values must agree to 1e-9.
- statsmodels 0.15.0 `statsmodels.tsa.stattools.acovf` (autocovariances, divided by n) and
  scipy's Student t: the formula of Diebold & Mariano (1995) and HLN (1997) coded by hand
  from those building blocks.
The tolerance part of the decision rule is common practice (a hysteresis band), no source.
"""

from __future__ import annotations

import numpy as np
import pytest
from dieboldmariano import dm_test as reference_dm_test
from scipy import stats
from statsmodels.tsa.stattools import acovf

from pipelines.engines.forecast_comparison import (
    StabilityRule,
    absolute_loss,
    class_loss_differential,
    dm_test,
    squared_scaled_loss,
    stable_choice,
)


def _losses(seed: int, n: int, shift: float):
    """Two loss series with MA(1) dependence; the challenger's mean loss is lower by `shift`."""
    rng = np.random.default_rng(seed)
    e = rng.normal(0, 1, n + 1)
    common = e[1:] + 0.6 * e[:-1]
    incumbent = 5 + common + rng.normal(0, 1, n)
    challenger = 5 - shift + common + rng.normal(0, 1, n)
    return incumbent, challenger


@pytest.mark.parametrize("h", [1, 2, 3, 6])
@pytest.mark.parametrize("seed,n,shift", [(1, 40, 0.0), (2, 30, 0.5), (3, 156, 0.2), (4, 12, 1.0)])
def test_dm_hln_equals_the_dieboldmariano_package(h, seed, n, shift):
    inc, chal = _losses(seed, n, shift)
    ours = dm_test(inc - chal, h=h, alternative="two-sided")
    estimator = ours.estimator[0]  # "bartlett" only where the acf sum is negative (the package then refuses "acf")
    zeros = np.zeros(n)
    # the package's loss(actual, prediction): hand it the losses themselves as "predictions"
    stat, p = reference_dm_test(
        zeros, inc, chal, loss=lambda u, v: v, h=h, harvey_correction=True, variance_estimator=estimator
    )
    assert ours.statistic[0] == pytest.approx(stat, rel=1e-9, abs=1e-12)
    assert ours.p_value[0] == pytest.approx(p, rel=1e-9, abs=1e-12)
    # one-sided "the challenger is better": the package's one-sided test with the challenger first
    _, p_one = reference_dm_test(
        zeros, chal, inc, loss=lambda u, v: v, h=h, one_sided=True, variance_estimator=estimator
    )
    assert dm_test(inc - chal, h=h, alternative="greater").p_value[0] == pytest.approx(p_one, rel=1e-9, abs=1e-12)


def test_negative_acf_variance_falls_back_to_bartlett_as_the_package_computes_it():
    # strongly alternating differentials: gamma_1 is about -gamma_0, so the acf sum is negative for h = 2
    rng = np.random.default_rng(5)
    d = np.where(np.arange(40) % 2 == 0, 1.0, -1.0) * 3 + 0.4 + rng.normal(0, 0.1, 40)
    ours = dm_test(d, h=2)
    assert ours.estimator[0] == "bartlett"
    stat, p = reference_dm_test(np.zeros(40), d, np.zeros(40), loss=lambda u, v: v, h=2, variance_estimator="bartlett")
    assert ours.statistic[0] == pytest.approx(stat, rel=1e-9)
    assert ours.p_value[0] == pytest.approx(p, rel=1e-9)


def test_dm_hln_by_hand_from_statsmodels_autocovariances_and_scipy_t():
    inc, chal = _losses(11, 60, 0.3)
    d = inc - chal
    n, h = len(d), 4
    gamma = acovf(d, adjusted=False, demean=True, fft=False, nlag=h - 1)  # divided by n
    v = (gamma[0] + 2 * gamma[1:].sum()) / n
    hln = np.sqrt((n + 1 - 2 * h + h * (h - 1) / n) / n)
    stat = d.mean() / np.sqrt(v) * hln
    ours = dm_test(d, h=h, alternative="greater")
    assert ours.variance[0] == pytest.approx(v, rel=1e-12)
    assert ours.statistic[0] == pytest.approx(stat, rel=1e-12)
    assert ours.p_value[0] == pytest.approx(stats.t.sf(stat, n - 1), rel=1e-12)


def test_many_tests_at_once_equal_one_at_a_time_and_the_test_can_tell():
    rows = [_losses(s, 52, shift) for s, shift in ((21, 0.0), (22, 1.5), (23, -1.5))]
    d = np.vstack([a - b for a, b in rows])
    batch = dm_test(d, h=3, alternative="greater")
    for i in range(3):
        single = dm_test(d[i], h=3, alternative="greater")
        assert batch.statistic[i] == single.statistic[0] and batch.p_value[i] == single.p_value[0]
    # no difference: not significant; a challenger better by 1.5 (sd about 1.4): significant; worse: p near 1
    assert batch.p_value[0] > 0.05 and batch.p_value[1] < 0.001 and batch.p_value[2] > 0.99


def test_degenerate_and_bad_input():
    same = dm_test(np.zeros(10), h=1)
    assert same.statistic[0] == 0 and same.p_value[0] == 1.0
    certain = dm_test(np.full(10, 0.5), h=1, alternative="greater")
    assert certain.statistic[0] == np.inf and certain.p_value[0] == 0.0
    with pytest.raises(ValueError, match="rows \\[1\\]"):
        dm_test(np.array([[1.0, 2, 3, 4], [1.0, np.nan, 3, 4]]), h=1)
    with pytest.raises(ValueError, match="horizon h"):
        dm_test(np.ones(5), h=5)


def test_class_loss_differential_sums_series_of_a_class_per_period():
    # series 0 and 1 in class 0, series 2 in class 1; 2 periods. Absolute errors:
    # incumbent |f - y|: s0 1, 2; s1 0, 1; s2 3, 3. challenger: s0 0, 2; s1 1, 1; s2 1, 5
    actual = np.array([[10.0, 10], [5, 5], [0, 0]])
    inc = absolute_loss(actual, np.array([[11.0, 12], [5, 6], [3, 3]]))
    chal = absolute_loss(actual, np.array([[10.0, 8], [6, 4], [1, 5]]))
    d = class_loss_differential(inc, chal, np.array([0, 0, 1]), 2)
    # class 0: (1 + 0) - (0 + 1) = 0, (2 + 1) - (2 + 1) = 0; class 1: 3 - 1 = 2, 3 - 5 = -2
    assert d.tolist() == [[0.0, 0.0], [2.0, -2.0]]
    # squared scaled loss: e^2 / q2, 0 where the series has no scale
    sq = squared_scaled_loss(np.array([[1.0], [1.0]]), np.array([[3.0], [3.0]]), np.array([2.0, np.nan]))
    assert sq.ravel().tolist() == [2.0, 0.0]


def test_stable_choice_keeps_the_incumbent_on_noise_and_switches_on_a_real_gain():
    rule = StabilityRule(tolerance=0.01, level=0.05)
    # class a: the flip of issue 12 (margin 0.0005 on WMAPE 0.40, 0.125 %, p 0.4): keep
    # class b: 5 % better, p 0.3: switch by the tolerance
    # class c: 0.5 % better but p 0.01: switch by the test
    # class d: no previous choice: first; class e: incumbent better: keep
    # class f: the incumbent is no longer offered: switch
    out = stable_choice(
        incumbent=np.array(["mint_shrink", "top_down", "wls_var", None, "bottom_up", "wls_var"], dtype=object),
        challenger=np.array(
            ["forecast_proportions", "bottom_up", "mint_shrink", "top_down", "top_down", "top_down"], dtype=object
        ),
        incumbent_score=np.array([0.4005, 0.50, 0.40, np.nan, 0.30, 0.50]),
        challenger_score=np.array([0.4000, 0.475, 0.398, 0.35, 0.31, 0.45]),
        p_value=np.array([0.4, 0.3, 0.01, np.nan, 0.9, 0.2]),
        rule=rule,
        candidates=np.array([True, True, True, True, True, False]),
    )
    assert out["chosen"].tolist() == ["mint_shrink", "bottom_up", "mint_shrink", "top_down", "bottom_up", "top_down"]
    assert out["decision"].tolist() == ["keep", "switch", "switch", "first", "keep", "switch"]
    assert out["reason"].tolist() == [
        "within_tolerance_not_significant",
        "gain_above_tolerance",
        "significant_by_test",
        "no_incumbent",
        "challenger_not_better",
        "incumbent_not_a_candidate",
    ]
    assert out["relative_gain"][1] == pytest.approx(0.05)
    assert "keep mint_shrink" in out["detail"][0] and "0.12 % better" in out["detail"][0]
    # the same data under "both": b and c are kept (each passes one of the two conditions only)
    both = stable_choice(
        out["incumbent"],
        out["challenger"],
        out["incumbent_score"],
        out["challenger_score"],
        out["p_value"],
        StabilityRule(switch_on="both"),
    )
    assert both["decision"].tolist()[:3] == ["keep", "keep", "keep"]
    with pytest.raises(ValueError, match="choose from"):
        StabilityRule(switch_on="sometimes")
