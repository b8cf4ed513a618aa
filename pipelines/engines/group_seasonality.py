"""Seasonal indices estimated on an aggregate and applied to its members; seasonal strength per series.

**Group seasonal indices** (GSI; Dalhart 1974, "Class seasonality: a new
approach", American Production and Inventory Control Society Conference
Proceedings; Withycombe 1989, "Forecasting with combined seasonal indices",
International Journal of Forecasting 5(4); Chen & Boylan 2007, "Use of
individual and group seasonal indices in subaggregate demand forecasting",
Journal of the Operational Research Society 58(12)). Weekly customer or parent
series are too short and noisy for their own seasonal model; the group they
belong to (the product across sites, the product class, a master-data group)
sums many of them, so its seasonal shape is estimated with far less noise.
Withycombe's combined index is the index of the aggregate series, which is
what `group_seasonality` estimates:

- aggregate A_g,t = sum of the members of group g (NaN cells = no value, left
  out; a period where no member has a value is NaN);
- classical decomposition of A (the one `cleaned_history` uses for its
  seasonal adjustment, called here; statsmodels' `seasonal_decompose`): trend
  = centred moving average of order m (2 x m for even m);
- multiplicative index I_p = mean over seasons of A_t / trend_t at season
  position p, normalised to mean 1; additive index a_p = mean of A_t - trend_t,
  centred to sum 0.

Applied to member i of group g at season position p:

- multiplicative: deseasonalised y_t / I_p, forecast f_t x I_p;
- additive: y_t - s_i a_p and f_t + s_i a_p, with s_i the member's share of the
  group's volume over the estimation window, so the members' components add
  up to the aggregate's (with equal shares 1/n this is Chen & Boylan's
  additive group index, the mean of the members' indices).

**Which form the cycle should use: multiplicative.** Members of one group
differ in size by orders of magnitude and their seasonal swing scales with
their level (the consumables class swings about +-20 % of its level); a
multiplicative index is scale-free and transfers to every member without a
share, keeps a zero forecast at zero, and commutes with a fixed-share split
(share x parent x I = (share x parent) x I), so parents and leaves stay
coherent. The additive form needs the share to scale, can push a small
member's deseasonalised history below zero, and is kept for aggregates whose
trend comes near zero, where ratios are unstable. Chen & Boylan (2007) show
GSI beats individual indices when members' seasonal shapes are similar and
their noise is large against their seasonality; whether it pays for a class
is for the backtest to say (`seasonality: auto`).

A group whose aggregate lacks a detrended value at some season position
(fewer than two full seasons of history) is not estimated: its index is
neutral (1 or 0) and `estimated` is False.

**Seasonal strength** (Wang, Smith & Hyndman 2006, "Characteristic-based
clustering for time series data", Data Mining and Knowledge Discovery 13(3);
in the form of Hyndman & Athanasopoulos, FPP 3rd ed., section 4.3):
F_S = max(0, 1 - Var(R) / Var(S + R)), with S and R the seasonal and
remainder components. FPP takes them from STL; here they come from the
classical additive decomposition above, which runs on every series at once
(STL is a loop per series), over the periods where the trend is defined.
A series without two full seasons has NaN; one with Var(S + R) = 0 has 0.
Caution: with m = 52 and three years of weekly history each position's index
is the mean of two or three detrended values, so part of the noise passes for
seasonality: pure noise showed F_S of about 0.45 (classical) and 0.7 (STL) in
`tests/test_group_seasonality_reference.py`. Read F_S of short weekly series
against that floor, and of a group's aggregate rather than of its members.

Shapes: values (n_series, T) dense blocks, NaN = no value; season positions
0..m-1, the first column of a block being at position `phase`.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np

from pipelines.engines.outliers import seasonal_component

FORMS = ("multiplicative", "additive")


def _check(values: np.ndarray, period: int, phase: int, form: str) -> np.ndarray:
    values = np.asarray(values, dtype=float)
    if values.ndim != 2:
        raise ValueError(f"expected a (n_series, n_periods) block, got shape {values.shape}")
    if period < 2:
        raise ValueError(f"the season length must be at least 2 periods, got {period}")
    if not 0 <= phase < period:
        raise ValueError(f"phase must be a season position in 0..{period - 1}, got {phase}")
    if form not in FORMS:
        raise ValueError(f"unknown seasonal form {form!r}; choose from {list(FORMS)}")
    return values


def group_totals(values: np.ndarray, group: np.ndarray, n_groups: int) -> np.ndarray:
    """(n_groups, T) sums of the members' values per period; NaN where no member of the group has a value."""
    values = np.asarray(values, dtype=float)
    group = np.asarray(group, dtype=np.int64)
    seen = ~np.isnan(values)
    total = np.zeros((n_groups, values.shape[1]))
    np.add.at(total, group, np.where(seen, values, 0.0))
    count = np.zeros((n_groups, values.shape[1]))
    np.add.at(count, group, seen.astype(float))
    return np.where(count > 0, total, np.nan)


def seasonal_indices(
    values: np.ndarray, period: int, form: Literal["multiplicative", "additive"] = "multiplicative", phase: int = 0
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Classical seasonal index of every row: (index (n, m) by season position, estimated (n,), trend (n, T)).

    Multiplicative: mean of x / trend per position (trend <= 0 left out),
    normalised to mean 1; additive: mean of x - trend, centred to sum 0 (as
    statsmodels' `seasonal_decompose`). A row not estimated gets 1 / 0.
    """
    x = _check(values, period, phase, form)
    n, t = x.shape
    additive, adjusted, trend = seasonal_component(x, period)
    cols = np.arange(period)
    if form == "additive":
        by_col = additive[:, :period] if t >= period else np.zeros((n, period))
        estimated = adjusted
    else:
        with np.errstate(invalid="ignore", divide="ignore"):
            ratio = np.where(trend > 0, x / trend, np.nan)
        seasons = -(-t // period)
        padded = np.full((n, seasons * period), np.nan)
        padded[:, :t] = ratio
        padded = padded.reshape(n, seasons, period)
        count = np.sum(~np.isnan(padded), axis=1)
        estimated = (count > 0).all(axis=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = np.nansum(padded, axis=1) / count
            by_col = np.where(
                estimated[:, None], mean / np.mean(np.where(estimated[:, None], mean, 1.0), axis=1, keepdims=True), 1.0
            )
    neutral = 1.0 if form == "multiplicative" else 0.0
    by_col = np.where(estimated[:, None], by_col, neutral)
    # column j is at position (phase + j) mod m, so position p is column (p - phase) mod m
    index = by_col[:, (cols - phase) % period]
    return index, estimated, trend


@dataclass(frozen=True)
class GroupSeasonality:
    """Indices of each group and what members need to apply them.

    index: (n_groups, m) by season position; estimated: (n_groups,);
    strength: (n_groups,) F_S of each aggregate; group: (n_series,) group of
    each member; share: (n_series,) member's share of its group's volume over
    the estimation block (used by the additive form); form, period.
    """

    index: np.ndarray
    estimated: np.ndarray
    strength: np.ndarray
    group: np.ndarray
    share: np.ndarray
    form: str
    period: int


def group_seasonality(
    values: np.ndarray,
    group: np.ndarray,
    n_groups: int,
    period: int,
    form: Literal["multiplicative", "additive"] = "multiplicative",
    phase: int = 0,
) -> GroupSeasonality:
    """Group seasonal indices (Withycombe 1989) of the members' aggregates; see the module docstring.

    values: (n_series, T) members' history, NaN = no value; group: (n_series,)
    codes 0..n_groups-1; period: m; phase: season position of column 0.
    """
    x = _check(values, period, phase, form)
    group = np.asarray(group, dtype=np.int64)
    if group.shape != (x.shape[0],) or (len(group) and (group.min() < 0 or group.max() >= n_groups)):
        raise ValueError(f"group must hold one code in 0..{n_groups - 1} per series ({x.shape[0]})")
    totals = group_totals(x, group, n_groups)
    index, estimated, _ = seasonal_indices(totals, period, form, phase)
    member_volume = np.nansum(x, axis=1)
    group_volume = np.bincount(group, weights=member_volume, minlength=n_groups)
    share = np.divide(member_volume, group_volume[group], out=np.zeros(len(group)), where=group_volume[group] != 0)
    return GroupSeasonality(
        index=index,
        estimated=estimated,
        strength=seasonal_strength(totals, period),
        group=group,
        share=share,
        form=form,
        period=period,
    )


def _positions(width: int, first_position: int, period: int) -> np.ndarray:
    return (first_position + np.arange(width)) % period


def member_component(
    gs: GroupSeasonality, width: int, first_position: int, rows: np.ndarray | None = None
) -> np.ndarray:
    """(n_series, width) seasonal factor (multiplicative) or component (additive) of each member.

    rows: optional subset of members (indices into gs.group).
    """
    group = gs.group if rows is None else gs.group[rows]
    factor = gs.index[group][:, _positions(width, first_position, gs.period)]
    if gs.form == "additive":
        share = gs.share if rows is None else gs.share[rows]
        factor = factor * share[:, None]
    return factor


def deseasonalise(values: np.ndarray, gs: GroupSeasonality, first_position: int = 0) -> np.ndarray:
    """Members' values without their group's seasonality: y / I (multiplicative) or y - s a (additive); (n, T)."""
    x = np.asarray(values, dtype=float)
    c = member_component(gs, x.shape[1], first_position)
    if gs.form == "multiplicative":
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(c > 0, x / c, x)
    return x - c


def reseasonalise(forecast: np.ndarray, gs: GroupSeasonality, first_position: int) -> np.ndarray:
    """Deseasonalised forecasts (n, h) with the group seasonality put back: f x I or f + s a.

    first_position: season position of the first horizon period.
    """
    f = np.asarray(forecast, dtype=float)
    c = member_component(gs, f.shape[1], first_position)
    return f * c if gs.form == "multiplicative" else f + c


def seasonal_strength(values: np.ndarray, period: int) -> np.ndarray:
    """F_S = max(0, 1 - Var(R) / Var(S + R)) per row (Wang, Smith & Hyndman 2006), classical additive decomposition.

    values: (n, T), NaN = no value. Variances (ddof = 1) over the periods
    where trend and value exist. NaN for a row without two full seasons.
    """
    x = _check(values, period, 0, "additive")
    s, adjusted, trend = seasonal_component(x, period)
    detrended = x - trend
    ok = np.isfinite(detrended)
    remainder = detrended - s
    var_r = _row_var(remainder, ok)
    var_sr = _row_var(detrended, ok)
    with np.errstate(invalid="ignore", divide="ignore"):
        strength = np.where(var_sr > 0, np.clip(1 - var_r / var_sr, 0.0, None), 0.0)
    return np.where(adjusted, strength, np.nan)


def _row_var(x: np.ndarray, ok: np.ndarray) -> np.ndarray:
    count = ok.sum(axis=1)
    mean = np.divide(np.where(ok, x, 0.0).sum(axis=1), count, out=np.zeros(len(count)), where=count > 0)
    dev = np.where(ok, x - mean[:, None], 0.0)
    return np.divide((dev**2).sum(axis=1), count - 1, out=np.full(len(count), np.nan), where=count > 1)
