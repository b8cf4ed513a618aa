"""Group seasonal indices and seasonal strength (`pipelines.engines.group_seasonality`).

Outside references:
- statsmodels 0.15.0 `statsmodels.tsa.seasonal.seasonal_decompose(aggregate, model=..., period=m)`:
  the classical decomposition of the group's aggregate. Our group index, laid out over the
  aggregate's periods, must equal its `seasonal` component (multiplicative and additive) to 1e-9,
  and our seasonal strength must equal F_S = max(0, 1 - Var(R) / Var(S + R)) (Wang, Smith &
  Hyndman 2006; FPP 3rd ed. section 4.3) computed from its components.
- statsmodels 0.15.0 `STL` (the decomposition FPP uses for F_S): a different decomposition, so
  only the ranking of series by strength is compared (see the module docstring of the test below).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import spearmanr
from statsmodels.tsa.seasonal import STL, seasonal_decompose

from pipelines.engines.group_seasonality import (
    deseasonalise,
    group_seasonality,
    group_totals,
    reseasonalise,
    seasonal_strength,
)


def test_hand_worked_two_period_season():
    # aggregate 10, 20, 10, 20, 10, 20 (m = 2): the 2 x 2 moving average (1/4, 1/2, 1/4) is 15 inside,
    # ratios 10/15 = 2/3 at position 0 and 20/15 = 4/3 at position 1 (mean 1 already);
    # additive: -5 and +5. Members 4, 8, ... and 6, 12, ... (shares 0.4 and 0.6)
    members = np.array([[4.0, 8, 4, 8, 4, 8], [6.0, 12, 6, 12, 6, 12]])
    gs = group_seasonality(members, np.array([0, 0]), 1, period=2)
    np.testing.assert_allclose(gs.index[0], [2 / 3, 4 / 3])
    np.testing.assert_allclose(deseasonalise(members, gs), [[6.0] * 6, [9.0] * 6])  # 4 / (2/3) = 6, 8 / (4/3) = 6
    add = group_seasonality(members, np.array([0, 0]), 1, period=2, form="additive")
    np.testing.assert_allclose(add.index[0], [-5.0, 5.0])
    np.testing.assert_allclose(add.share, [0.4, 0.6])
    # member components 0.4 x (-5, 5) = (-2, 2) and 0.6 x (-5, 5) = (-3, 3): 4 + 2 = 6, 8 - 2 = 6
    np.testing.assert_allclose(deseasonalise(members, add), [[6.0] * 6, [9.0] * 6])
    assert gs.strength[0] == 1.0  # no remainder at all


def _members(seed: int, n: int, t: int, m: int, noise: float):
    """n members with one multiplicative yearly shape, different levels and start dates, Poisson-ish noise."""
    rng = np.random.default_rng(seed)
    shape = 1 + 0.2 * np.sin(2 * np.pi * np.arange(t) / m) + 0.1 * np.cos(4 * np.pi * np.arange(t) / m)
    level = rng.uniform(2, 200, n)[:, None] * (1 + 0.002 * np.arange(t))
    x = level * shape * np.exp(rng.normal(0, noise, (n, t)))
    start = rng.integers(0, t // 4, n)
    start[:3] = 0  # every group of the tests holds one of these, so its aggregate has no empty period
    x[np.arange(t)[None, :] < start[:, None]] = np.nan  # members start at different periods
    return x


@pytest.mark.parametrize("form", ["multiplicative", "additive"])
@pytest.mark.parametrize("m,t,phase", [(52, 156, 0), (52, 130, 17), (12, 48, 5)])
def test_group_index_equals_statsmodels_decomposition_of_the_aggregate(form, m, t, phase):
    x = _members(3, 30, t, m, 0.3)
    group = np.arange(30) % 3  # three groups of ten members
    gs = group_seasonality(x, group, 3, period=m, form=form, phase=phase)
    totals = group_totals(x, group, 3)
    assert gs.estimated.all()
    for g in range(3):
        ref = seasonal_decompose(totals[g], model=form, period=m)  # reference: statsmodels 0.15.0
        ours = gs.index[g][(phase + np.arange(t)) % m]  # our index by season position, laid out over the periods
        np.testing.assert_allclose(ours, ref.seasonal, rtol=0, atol=1e-9)
        # strength of the aggregate: F_S from the additive components (FPP 3rd ed. 4.3)
        additive = seasonal_decompose(totals[g], model="additive", period=m)
        sr = totals[g] - additive.trend
        ok = np.isfinite(sr)
        expected = max(0.0, 1 - np.var(additive.resid[ok], ddof=1) / np.var(sr[ok], ddof=1))
        assert gs.strength[g] == pytest.approx(expected, rel=1e-9)


def test_reseasonalise_undoes_deseasonalise_and_shares_make_the_additive_parts_add_up():
    x = _members(4, 12, 104, 52, 0.2)
    group = np.repeat([0, 1], 6)
    for form in ("multiplicative", "additive"):
        gs = group_seasonality(x, group, 2, period=52, form=form, phase=9)
        back = reseasonalise(deseasonalise(x, gs, first_position=9), gs, first_position=9)
        np.testing.assert_allclose(back, x, rtol=1e-12, equal_nan=True)
    add = group_seasonality(x, group, 2, period=52, form="additive")
    assert np.bincount(group, weights=add.share).tolist() == pytest.approx([1.0, 1.0])


def test_group_index_recovers_the_shape_that_no_single_noisy_member_shows():
    # the point of the method: a member with heavy noise has a poor index of its own; the group's is close
    m, t = 52, 156
    x = _members(5, 40, t, m, 0.6)
    truth = 1 + 0.2 * np.sin(2 * np.pi * np.arange(m) / m) + 0.1 * np.cos(4 * np.pi * np.arange(m) / m)
    truth /= truth.mean()
    group_index = group_seasonality(x, np.zeros(40, dtype=np.int64), 1, period=m).index[0]
    own = group_seasonality(x, np.arange(40), 40, period=m)
    own_error = np.abs(own.index - truth)[own.estimated].mean()
    group_error = np.abs(group_index - truth).mean()
    assert group_error < own_error / 3


def test_a_group_shorter_than_two_seasons_is_not_estimated_and_left_unchanged():
    x = _members(6, 4, 60, 52, 0.1)  # 60 weeks
    gs = group_seasonality(x, np.zeros(4, dtype=np.int64), 1, period=52)
    assert not gs.estimated[0] and (gs.index == 1.0).all() and np.isnan(gs.strength[0])
    np.testing.assert_array_equal(deseasonalise(x, gs), x)
    with pytest.raises(ValueError, match="choose from"):
        group_seasonality(x, np.zeros(4, dtype=np.int64), 1, period=52, form="both")
    with pytest.raises(ValueError, match="one code in 0..0"):
        group_seasonality(x, np.array([0, 0, 0, 1]), 1, period=52)


def test_seasonal_strength_ranks_series_as_stl_strength_does():
    # STL (FPP's decomposition) and the classical one give different F_S on 3 years of weekly data
    # (both overfit a 52-position index from 2-3 values per position: pure noise shows F_S of about
    # 0.45 classical and 0.7 STL here), so only the ranking of amplitudes 0..30 is compared
    rng = np.random.default_rng(1)
    t = np.arange(156)
    amps = [0, 2, 5, 10, 30]
    x = np.vstack([100 + 0.2 * t + a * np.sin(2 * np.pi * t / 52) + rng.normal(0, 4, 156) for a in amps])
    ours = seasonal_strength(x, 52)
    stl = []
    for row in x:
        fit = STL(row, period=52).fit()  # reference: statsmodels 0.15.0 STL
        stl.append(max(0.0, 1 - np.var(fit.resid, ddof=1) / np.var(fit.seasonal + fit.resid, ddof=1)))
    assert spearmanr(ours, stl).statistic == pytest.approx(1.0)
    assert ours[-1] > 0.95 and ours[0] < 0.6
