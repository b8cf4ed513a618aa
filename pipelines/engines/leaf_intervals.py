"""Prediction intervals at leaf grain for split strategies, normal bounds, and coverage from backtest actuals.

**Top-down and forecast-proportions splits** (`split_interval`). The leaf
forecast is f_j,h = w_j,h x F_P,h with the split weight w_j,h = b_j,h / sum_k
b_k,h (the period's share or target for `top_down`; the children's own base
forecasts for `forecast_proportions`, Athanasopoulos, Ahmed & Hyndman 2009).
Stated assumption: **within a period the weights are fixed** - known, not
random. Then the leaf is a non-negative multiple of the parent, and for w >= 0
every quantile scales: Q_leaf(q) = w x Q_parent(q). The leaves of one parent
are then perfectly dependent (comonotone), so their bounds add up to the
parent's bounds, and the intervals are coherent in the quantile sense. This is
what hierarchicalforecast's `TopDown` with `intervals_method="normality"`
gives for fixed proportions (P carries only the parent's column, so the
leaf's standard deviation is w x the parent's). What it leaves out: the
uncertainty of the shares themselves and the leaf's own noise around its
share, so leaf intervals are too narrow where shares move; the backtest's
coverage per level (`interval_coverage`) measures by how much.

**Bottom-up and MinT**: coherent normal intervals come from
`pipelines.engines.tree_reconciliation.reconcile_tree(..., sigma=...)`
(reconciled covariance S P W_h P' S'); `normal_bounds` turns its standard
deviations into bounds, `sd_from_interval` turns a base model's interval
(statsforecast's, for the parents) into the standard deviations it needs.

**Coverage** (`interval_coverage`): the share of actuals inside [lower,
upper], bounds included (as utilsforecast's `coverage`), per group (class,
strategy and grain); a well calibrated 80 % interval covers about 80 %.

Shapes: bounds of one level are (n_parents, h) at the parent and (n_children,
h) at the leaf; several levels stack in front, (L, n, h). parent_of_child is
(n_children,) with codes 0..n_parents-1.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.stats import norm

from pipelines.engines.hierarchy import split_by_basis


def _levels(levels) -> np.ndarray:
    lv = np.atleast_1d(np.asarray(levels, dtype=float))
    if ((lv <= 0) | (lv >= 100)).any():
        raise ValueError(f"interval levels are percentages strictly between 0 and 100, got {lv.tolist()}")
    return lv


def normal_bounds(mean: np.ndarray, sd: np.ndarray, levels) -> tuple[np.ndarray, np.ndarray]:
    """(lower, upper), each (L, *mean.shape): mean -+ z_{0.5 + L/200} sd for every level L (in %)."""
    lv = _levels(levels)
    z = norm.ppf(0.5 + lv / 200).reshape((-1,) + (1,) * np.ndim(mean))
    mean = np.asarray(mean, dtype=float)[None]
    sd = np.asarray(sd, dtype=float)[None]
    return mean - z * sd, mean + z * sd


def sd_from_interval(lower: np.ndarray, upper: np.ndarray, level: float) -> np.ndarray:
    """Standard deviation of a symmetric normal interval: (upper - lower) / (2 z_{0.5 + level/200})."""
    z = norm.ppf(0.5 + _levels(level)[0] / 200)
    return (np.asarray(upper, dtype=float) - np.asarray(lower, dtype=float)) / (2 * z)


def split_weights(
    basis: np.ndarray, parent_of_child: np.ndarray, n_parents: int, fallback: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """(n_children, h) weights b_j / sum_k b_k per parent and period, and where the fallback basis was used.

    The same rule as the cycle's split (`hierarchy.split_by_basis`, called
    with a parent of ones): a period whose basis sums to 0 takes `fallback`;
    where that too is 0 the weights are 0.
    """
    basis = np.asarray(basis, dtype=float)
    ones = np.ones((n_parents,) + basis.shape[1:])
    return split_by_basis(ones, basis, np.asarray(parent_of_child, dtype=np.int64), fallback)


def split_interval(
    parent_lower: np.ndarray, parent_upper: np.ndarray, weights: np.ndarray, parent_of_child: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Leaf bounds = weight x parent bounds (fixed weights within a period; see the module docstring).

    parent_lower, parent_upper: (..., n_parents, h) (leading axes = levels);
    weights: (n_children, h), >= 0. Returns (..., n_children, h) each.
    """
    w = np.asarray(weights, dtype=float)
    if (w < 0).any():
        raise ValueError("split_interval: split weights must be >= 0 (a negative weight would swap the bounds)")
    pc = np.asarray(parent_of_child, dtype=np.int64)
    lo = np.take(np.asarray(parent_lower, dtype=float), pc, axis=-2) * w
    hi = np.take(np.asarray(parent_upper, dtype=float), pc, axis=-2) * w
    return lo, hi


@dataclass(frozen=True)
class Coverage:
    """Per group (n_groups,): share of actuals inside the bounds, cells counted, share below and above, mean width."""

    coverage: np.ndarray
    cells: np.ndarray
    below: np.ndarray
    above: np.ndarray
    mean_width: np.ndarray


def interval_coverage(
    actual: np.ndarray,
    lower: np.ndarray,
    upper: np.ndarray,
    group: np.ndarray | None = None,
    n_groups: int | None = None,
) -> Coverage:
    """Coverage of one level's intervals, per group of rows.

    actual, lower, upper: (n, h) (NaN actual = not scored, left out); group:
    (n,) codes 0..n_groups-1 (None = one group). A group without scored
    cells has NaN figures.
    """
    y = np.asarray(actual, dtype=float)
    lo = np.asarray(lower, dtype=float)
    hi = np.asarray(upper, dtype=float)
    if not (y.shape == lo.shape == hi.shape):
        raise ValueError(
            f"interval_coverage: actual, lower and upper differ in shape: {y.shape}, {lo.shape}, {hi.shape}"
        )
    if y.ndim == 1:
        y, lo, hi = y[:, None], lo[:, None], hi[:, None]
    n = y.shape[0]
    if group is None:
        group, n_groups = np.zeros(n, dtype=np.int64), 1
    else:
        group = np.asarray(group, dtype=np.int64)
        n_groups = int(group.max()) + 1 if n_groups is None else n_groups
    scored = np.isfinite(y) & np.isfinite(lo) & np.isfinite(hi)

    def per_group(mask: np.ndarray, weights: np.ndarray | None = None) -> np.ndarray:
        values = mask.astype(float) if weights is None else np.where(mask, weights, 0.0)
        return np.bincount(group, weights=values.sum(axis=1), minlength=n_groups)

    cells = per_group(scored)
    inside = per_group(scored & (y >= lo) & (y <= hi))
    below = per_group(scored & (y < lo))
    above = per_group(scored & (y > hi))
    width = per_group(scored, hi - lo)
    ratio = lambda x: np.divide(x, cells, out=np.full(n_groups, np.nan), where=cells > 0)  # noqa: E731
    return Coverage(
        coverage=ratio(inside), cells=cells, below=ratio(below), above=ratio(above), mean_width=ratio(width)
    )
