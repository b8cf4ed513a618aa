"""Scaled accuracy beside WMAPE: RMSSE and MASE per series and pooled, and the metric each class is judged by.

All functions work on many series at once: in-sample history as long arrays
(`series` codes, each series' rows consecutive and in time order, `y`), as the
cycle's series grids hold it; forecasts and actuals as dense (n_series, h)
blocks. Errors are e = forecast - actual.

**RMSSE** (root mean squared scaled error), the accuracy measure of the M5
competition (Makridakis, Spiliotis & Assimakopoulos 2022, "M5 accuracy
competition: Results, findings, and conclusions", International Journal of
Forecasting 38(4), eq. 1):

    RMSSE_i = sqrt( (1/h) sum_{t=n+1}^{n+h} (y_t - f_t)^2  /  q2_i ),
    q2_i    = (1/(n-m)) sum_{t=m+1}^{n} (y_t - y_{t-m})^2,

with m = 1 in M5 (m = the season length gives the seasonal variant, as MASE
has one). M5 counts the in-sample periods from a series' first non-zero demand
(leading zeros are not history); the cycle's series grids already start there.
A series with q2 = 0 (constant in-sample) or fewer than m + 1 in-sample
periods has no RMSSE (NaN) and is left out of every pooled figure.

**MASE** (Hyndman & Koehler 2006) comes from `accuracy.mase_scale`, called
here, not copied: MASE_i = mean_t |e_t| / q_i, q_i = mean |y_t - y_{t-m}|.

**Pooling** over the series of a class (and over backtest origins: pass one
row per series and origin). M5 weights each series' RMSSE by its dollar sales
over the last 28 days of the training sample (and averages 12 aggregation
levels). The tool has no prices and scores one grain at a time, so
`pooled_rmsse` takes:

- `weights="volume"` (default): each row weighted by its units over the last
  `window` in-sample periods (`volume_weights`; the backtest horizon is the
  natural window, as 28 days was M5's). The strategy choice serves the plan's
  volume; an unweighted mean lets the many tiny intermittent series decide, a
  scale-free error of a series selling 1 unit a year counting as much as one
  selling 1,000 a week.
- `weights="equal"`: the plain mean of the per-row RMSSE (what a histogram of
  per-series RMSSE averages to).
- an array: any other non-negative weights (one per row).

Rows with NaN RMSSE or zero weight are left out; when nothing is left the
pooled value is NaN.

**Metric by demand class.** WMAPE is an absolute-error measure: its optimum is
the median, and for intermittent demand (median 0 in most periods) it rewards
a forecast of zero (Kolassa 2016, "Evaluating predictive count data
distributions in retail sales forecasting", IJF 32(3); the M5 organisers chose
RMSSE for intermittent retail series for that reason). `MetricRule` maps each
demand class (Syntetos, Boylan & Croston 2005, as the cycle classifies series)
to a metric - by default smooth and erratic -> `wmape`, intermittent and lumpy
-> `rmsse` - and `class_metric` gives each product class the metric that
holds the largest share of its series (or volume). All three metrics are
lower-is-better.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np

from pipelines.engines.accuracy import mase_scale

METRICS = ("wmape", "rmsse", "mase")
DEMAND_CLASSES = ("smooth", "erratic", "intermittent", "lumpy")


def _lagged(series: np.ndarray, m: int) -> np.ndarray:
    """Boolean mask of the rows t >= m whose row t - m belongs to the same series."""
    same = np.zeros(len(series), dtype=bool)
    if m < len(series):
        same[m:] = series[m:] == series[:-m]
    return same


def rmsse_scale(series: np.ndarray, y: np.ndarray, n_series: int, m: int = 1) -> np.ndarray:
    """Per series: q2 = mean (y_t - y_{t-m})^2 over its in-sample rows (NaN with fewer than m + 1 rows).

    series, y: aligned long arrays (N,), each series' rows consecutive and in
    time order. Returns (n_series,). The squared counterpart of MASE's
    `mase_scale` (M5's denominator).
    """
    if m < 1:
        raise ValueError(f"rmsse_scale: the difference lag m must be at least 1, got {m}")
    series = np.asarray(series, dtype=np.int64)
    y = np.asarray(y, dtype=float)
    same = _lagged(series, m)
    diff2 = np.zeros(len(y))
    diff2[m:] = (y[m:] - y[:-m]) ** 2
    count = np.bincount(series[same], minlength=n_series)
    total = np.bincount(series[same], weights=diff2[same], minlength=n_series)
    return np.divide(total, count, out=np.full(n_series, np.nan), where=count > 0)


def rmsse(actual: np.ndarray, forecast: np.ndarray, scale2: np.ndarray) -> np.ndarray:
    """Per row: sqrt(mean_t (f - y)^2 / q2); NaN where q2 is not a positive number.

    actual, forecast: (n, h); scale2: (n,) from `rmsse_scale`. NaN cells of
    `actual` (periods without an actual) are left out of the row's mean.
    """
    actual = np.asarray(actual, dtype=float)
    forecast = np.asarray(forecast, dtype=float)
    q2 = np.asarray(scale2, dtype=float)
    e2 = (forecast - actual) ** 2
    ok = np.isfinite(e2)
    cells = ok.sum(axis=1)
    mse = np.divide(np.where(ok, e2, 0.0).sum(axis=1), cells, out=np.full(len(q2), np.nan), where=cells > 0)
    good = np.isfinite(q2) & (q2 > 0) & np.isfinite(mse)
    return np.sqrt(np.divide(mse, q2, out=np.full(len(q2), np.nan), where=good))


def mase(actual: np.ndarray, forecast: np.ndarray, scale: np.ndarray) -> np.ndarray:
    """Per row: mean_t |f - y| / q (Hyndman & Koehler 2006); NaN where q is not a positive number.

    actual, forecast: (n, h); scale: (n,) from `accuracy.mase_scale`.
    """
    e = np.abs(np.asarray(forecast, dtype=float) - np.asarray(actual, dtype=float))
    q = np.asarray(scale, dtype=float)
    ok = np.isfinite(e)
    cells = ok.sum(axis=1)
    mae = np.divide(np.where(ok, e, 0.0).sum(axis=1), cells, out=np.full(len(q), np.nan), where=cells > 0)
    good = np.isfinite(q) & (q > 0) & np.isfinite(mae)
    return np.divide(mae, q, out=np.full(len(q), np.nan), where=good)


@dataclass(frozen=True)
class ScaledErrors:
    """Per series (n,): MASE, RMSSE and their in-sample scales q (mean |diff|) and q2 (mean diff^2)."""

    mase: np.ndarray
    rmsse: np.ndarray
    mase_scale: np.ndarray
    rmsse_scale: np.ndarray


def scaled_errors(
    series: np.ndarray, y: np.ndarray, actual: np.ndarray, forecast: np.ndarray, m: int = 1
) -> ScaledErrors:
    """MASE and RMSSE of every series from its in-sample history and its test block.

    series, y: in-sample long arrays (N,) as for `rmsse_scale`; actual,
    forecast: (n_series, h), row i being series code i.
    """
    n = np.asarray(actual).shape[0]
    q = mase_scale(np.asarray(series, dtype=np.int64), np.asarray(y, dtype=float), n, m)
    q2 = rmsse_scale(series, y, n, m)
    return ScaledErrors(mase=mase(actual, forecast, q), rmsse=rmsse(actual, forecast, q2), mase_scale=q, rmsse_scale=q2)


def volume_weights(series: np.ndarray, y: np.ndarray, n_series: int, window: int) -> np.ndarray:
    """Per series: units over its last `window` in-sample rows (M5's weight, in units instead of dollars).

    series, y: long arrays as for `rmsse_scale`. Returns (n_series,), 0 for a
    series without rows. Negative values (returns) count as they are.
    """
    if window < 1:
        raise ValueError(f"volume_weights: window must be at least 1 period, got {window}")
    series = np.asarray(series, dtype=np.int64)
    length = np.bincount(series, minlength=n_series)
    end = np.cumsum(length)  # one past each series' last row (rows are grouped by series)
    position_from_end = end[series] - np.arange(len(series))  # 1 for the last row
    recent = position_from_end <= window
    return np.bincount(series[recent], weights=np.asarray(y, dtype=float)[recent], minlength=n_series)


def pooled_rmsse(
    values: np.ndarray,
    weights: Literal["volume", "equal"] | np.ndarray = "volume",
    volume: np.ndarray | None = None,
    group: np.ndarray | None = None,
    n_groups: int | None = None,
) -> np.ndarray:
    """Weighted mean of per-row RMSSE, per group; see the module docstring for the choice of weights.

    values: (n,) per-row RMSSE (a row = a series at one origin); weights:
    "volume" (then `volume` (n,) is required), "equal", or an (n,) array;
    group: (n,) integer codes 0..n_groups-1 (None = one group). Returns
    (n_groups,), NaN for a group with no scored row of positive weight.
    """
    values = np.asarray(values, dtype=float)
    n = len(values)
    if isinstance(weights, str):
        if weights == "volume":
            if volume is None:
                raise ValueError(
                    "pooled_rmsse: weights='volume' needs `volume`, one value per row (see volume_weights)"
                )
            w = np.asarray(volume, dtype=float)
        elif weights == "equal":
            w = np.ones(n)
        else:
            raise ValueError(
                f"pooled_rmsse: unknown weights {weights!r}; choose from ['volume', 'equal'] or pass an array"
            )
    else:
        w = np.asarray(weights, dtype=float)
    if w.shape != (n,):
        raise ValueError(f"pooled_rmsse: weights must have one value per row ({n}), got shape {w.shape}")
    if group is None:
        group, n_groups = np.zeros(n, dtype=np.int64), 1
    elif n_groups is None:
        n_groups = int(group.max()) + 1 if n else 0
    total, mass = rmsse_sums(values, w, group, n_groups)
    return np.divide(total, mass, out=np.full(n_groups, np.nan), where=mass > 0)


def rmsse_sums(
    values: np.ndarray, weights: np.ndarray, group: np.ndarray, n_groups: int
) -> tuple[np.ndarray, np.ndarray]:
    """(n_groups,) each: the weighted sum of per-row RMSSE and the weights, over the rows with a finite value and
    a positive weight: the two sums `pooled_rmsse` divides, additive over disjoint sets of rows (shards)."""
    values, w = np.asarray(values, dtype=float), np.asarray(weights, dtype=float)
    ok = np.isfinite(values) & np.isfinite(w) & (w > 0)
    total = np.bincount(group[ok], weights=w[ok] * values[ok], minlength=n_groups)
    return total, np.bincount(group[ok], weights=w[ok], minlength=n_groups)


@dataclass(frozen=True)
class MetricRule:
    """Which metric judges a product class, from the demand classes of its series.

    One metric per demand class (from METRICS); `dominance`: whether the
    share of a metric in a class is counted in series ("series") or in
    volume ("volume"). Defaults: smooth and erratic by WMAPE, intermittent and
    lumpy by RMSSE.
    """

    smooth: str = "wmape"
    erratic: str = "wmape"
    intermittent: str = "rmsse"
    lumpy: str = "rmsse"
    dominance: Literal["series", "volume"] = "series"

    def __post_init__(self) -> None:
        for dc in DEMAND_CLASSES:
            if getattr(self, dc) not in METRICS:
                raise ValueError(f"MetricRule.{dc}: unknown metric {getattr(self, dc)!r}; choose from {list(METRICS)}")
        if self.dominance not in ("series", "volume"):
            raise ValueError(
                f"MetricRule.dominance: unknown value {self.dominance!r}; choose from ['series', 'volume']"
            )

    def metric_of(self, demand_class: np.ndarray) -> np.ndarray:
        """(n,) metric name per series; '' for a series outside the four demand classes (e.g. no_demand)."""
        demand_class = np.asarray(demand_class, dtype=object)
        out = np.full(len(demand_class), "", dtype=object)
        for dc in DEMAND_CLASSES:
            out[demand_class == dc] = getattr(self, dc)
        return out


@dataclass(frozen=True)
class ClassMetric:
    """Per product class (n_classes,): the metric it is judged by and that metric's share of the class; `mass`
    (n_classes, len(METRICS)): the series (or units) of each metric, additive over shards (`metric_of_mass`)."""

    metric: np.ndarray
    share: np.ndarray
    mass: np.ndarray | None = None


def class_metric(
    class_code: np.ndarray,
    demand_class: np.ndarray,
    n_classes: int,
    rule: MetricRule = MetricRule(),
    volume: np.ndarray | None = None,
) -> ClassMetric:
    """The metric of each product class: the one whose demand classes hold the largest share of it.

    class_code: (n,) product-class code of each series; demand_class: (n,)
    the series' demand class; volume: (n,) units, needed with
    `rule.dominance == "volume"`. Series outside the four demand classes
    (no_demand) count for nothing. Ties go to the metric listed first in
    METRICS; a class with nothing to count gets the metric of `smooth`
    (share NaN).
    """
    class_code = np.asarray(class_code, dtype=np.int64)
    metric = rule.metric_of(demand_class)
    if rule.dominance == "volume":
        if volume is None:
            raise ValueError("class_metric: MetricRule(dominance='volume') needs `volume`, one value per series")
        w = np.clip(np.asarray(volume, dtype=float), 0.0, None)
    else:
        w = np.ones(len(class_code))
    mass = np.zeros((n_classes, len(METRICS)))
    for j, name in enumerate(METRICS):  # three metrics, not a loop over series
        mine = metric == name
        mass[:, j] = np.bincount(class_code[mine], weights=w[mine], minlength=n_classes)
    chosen, share = metric_of_mass(mass, rule.smooth)
    return ClassMetric(metric=chosen, share=share, mass=mass)


def metric_of_mass(mass: np.ndarray, empty: str) -> tuple[np.ndarray, np.ndarray]:
    """(metric, share), each (n_classes,), of a (n_classes, len(METRICS)) mass: the metric holding the most (ties
    to the one listed first in METRICS), `empty` where the class has nothing to count (share NaN)."""
    mass = np.asarray(mass, dtype=float)
    total = mass.sum(axis=1)
    best = np.argmax(mass, axis=1)  # first maximum: ties to the metric listed first
    chosen = np.array(METRICS, dtype=object)[best]
    chosen[total <= 0] = empty
    share = np.divide(mass[np.arange(len(mass)), best], total, out=np.full(len(mass), np.nan), where=total > 0)
    return chosen, share
