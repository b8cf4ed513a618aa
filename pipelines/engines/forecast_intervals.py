"""Prediction intervals of the cycle's coherent forecasts, per strategy, at parent and leaf grain.

The base forecasts' standard deviations come from statsforecast
(`pipelines.engines.models.run_model_groups`, `sd=True`). Per strategy:

- `top_down`, `forecast_proportions`: the parent's normal interval around its
  forecast, F +- z sd, carried to the leaves with the split's weights
  w_j = f_j / F (`leaf_intervals.split_interval`). Assumption: the weights are
  fixed within a period, so every quantile scales with them (the leaf
  intervals leave out the shares' own uncertainty; the backtest's coverage
  says by how much they are too narrow).
- `bottom_up`: each leaf's own normal interval; the parent's sd is that of a
  sum of independent leaves, sqrt(sum sd_j^2) (as hierarchicalforecast's
  `BottomUp` with `Normality`).
- `mint_shrink`, `wls_var`: the reconciled covariance S P (D R D) P' S' of the
  normal approximation (Wickramasuriya et al. 2019; Panagiotelis et al. 2023),
  per parent tree or over the tree with the upper levels
  (`tree_reconciliation.reconcile_tree` with `sigma`).

Every interval is centred on the cycle's coherent forecast (after the
lifecycle, so a period set to 0 has bounds 0) and its lower bound is cut at 0
(demand is not negative; no actual >= 0 moves out of the interval by it).
Bounds: (L, n, h) arrays, levels first.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from pipelines.engines.hierarchy import parent_sums
from pipelines.engines.leaf_intervals import normal_bounds, split_interval
from pipelines.engines.tree_reconciliation import reconcile_tree, tree_from_parent_codes
from pipelines.vocabulary import Strategy

SPLIT = (Strategy.TOP_DOWN, Strategy.FORECAST_PROPORTIONS)
RECONCILED = (Strategy.MINT_SHRINK, Strategy.WLS_VAR)


def reconciled_sd(
    method: str, parent_of_child: np.ndarray, n_parents: int, parent_sd, leaf_sd, parent_res, leaf_res, base_p, base_l
) -> tuple[np.ndarray, np.ndarray]:
    """(parent sd, leaf sd) of MinT / WLS over each parent and its children (normal approximation)."""
    tree = tree_from_parent_codes([np.asarray(parent_of_child, dtype=np.int64)], n_top=n_parents)
    res = None if parent_res is None else np.vstack([parent_res, leaf_res])
    out = reconcile_tree(
        tree, np.vstack([base_p, base_l]), method, residuals=res, sigma=np.vstack([parent_sd, leaf_sd]), dense=True
    )
    return out.sd[:n_parents], out.sd[n_parents:]


def strategy_sd(
    strategy_of_parent: np.ndarray,
    parent_of_child: np.ndarray,
    base,
    parent_point: np.ndarray,
    leaf_point: np.ndarray,
    tree_sd: tuple[np.ndarray, np.ndarray] | None = None,
) -> tuple[np.ndarray, np.ndarray | None]:
    """(parent sd (n_parents, h), leaf sd (n_children, h) or NaN rows for split strategies) per strategy.

    base: `BaseForecasts` made with `sd=True`; tree_sd: the (parent, leaf) sd
    of a reconciliation over the upper levels, used for MinT / WLS parents.
    """
    n_parents = parent_point.shape[0]
    p_sd = np.zeros_like(parent_point)
    l_sd = np.full_like(leaf_point, np.nan)
    for strategy in np.unique(strategy_of_parent):  # a handful of strategies
        ps = strategy_of_parent == strategy
        cs = ps[parent_of_child]
        if strategy in SPLIT:
            p_sd[ps] = base.parent_sd[ps]
        elif strategy == Strategy.BOTTOM_UP:
            l_sd[cs] = base.leaf_sd[cs]
            p_sd[ps] = np.sqrt(parent_sums(base.leaf_sd**2 * cs[:, None], parent_of_child, n_parents))[ps]
        elif tree_sd is not None and np.isfinite(tree_sd[0][ps]).all():
            p_sd[ps], l_sd[cs] = tree_sd[0][ps], tree_sd[1][cs]
        else:
            remap = np.cumsum(ps) - 1
            p, leaf = reconciled_sd(
                strategy, remap[parent_of_child[cs]], int(ps.sum()), base.parent_sd[ps], base.leaf_sd[cs],
                None if base.parent_res is None else base.parent_res[ps],
                None if base.leaf_res is None else base.leaf_res[cs], base.parent_fc[ps], base.leaf_fc[cs],
            )
            p_sd[ps], l_sd[cs] = p, leaf
    return p_sd, l_sd


def coherent_intervals(
    levels: Sequence[float],
    parent_point: np.ndarray,
    leaf_point: np.ndarray,
    parent_of_child: np.ndarray,
    parent_sd: np.ndarray,
    leaf_sd: np.ndarray,
    parent_zero: np.ndarray | None = None,
    leaf_zero: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """(parent lower, parent upper, leaf lower, leaf upper), each (L, n, h); see the module docstring.

    A leaf with a NaN sd (a split strategy's) takes its parent's bounds times
    its weight f_j / F; the others their own normal bounds. parent_zero,
    leaf_zero: (n, h) cells whose bounds are 0 (periods the lifecycle set to
    0, inactive children).
    """
    p_lo, p_hi = normal_bounds(parent_point, parent_sd, levels)
    split = np.isnan(leaf_sd)[None]
    if split.any() or not split.size:  # each kind of bound made only where some leaf takes it
        parent_of_leaf = parent_point[parent_of_child]
        weight = np.divide(leaf_point, parent_of_leaf, out=np.zeros_like(leaf_point), where=parent_of_leaf > 0)
        s_lo, s_hi = split_interval(p_lo, p_hi, np.clip(weight, 0, None), parent_of_child)
    if not split.all():
        o_lo, o_hi = normal_bounds(leaf_point, np.nan_to_num(leaf_sd), levels)
    if split.all():
        l_lo, l_hi = s_lo, s_hi
    elif not split.any():
        l_lo, l_hi = o_lo, o_hi
    else:
        l_lo, l_hi = np.where(split, s_lo, o_lo), np.where(split, s_hi, o_hi)
    # every bound is an array made above for this result alone: clipped and zeroed in place, no copies
    for bound, zero in ((p_lo, parent_zero), (p_hi, parent_zero), (l_lo, leaf_zero), (l_hi, leaf_zero)):
        np.clip(bound, 0, None, out=bound)
        if zero is not None:
            bound[:, zero] = 0.0  # every level's cells of the periods set to 0
    return p_lo, p_hi, l_lo, l_hi


def interval_frame(levels: Sequence[float], lower: np.ndarray, upper: np.ndarray):
    """Long-row bound columns (`lower_80`, `upper_80`, ...) of (L, n, h) bounds, rows series-major like the tables."""
    import pandas as pd

    from pipelines.vocabulary import interval_columns

    out = {}
    for i, level in enumerate(levels):
        lo, hi = interval_columns(level)
        out[lo] = np.asarray(lower[i], dtype=float).ravel()
        out[hi] = np.asarray(upper[i], dtype=float).ravel()
    return pd.DataFrame(out, copy=False)  # the bounds as they are, not copied into one block


def interval_frames(
    levels: Sequence[float], strategy_of_parent, parent_of_child, base, parent_fc, leaf_fc, parent_zero, leaf_zero,
    tree_sd=None,
):
    """(parent bound columns, leaf bound columns) of the cycle's forecast, rows series-major (empty without levels)."""
    import pandas as pd

    if not len(levels):
        return pd.DataFrame(index=range(parent_fc.size)), pd.DataFrame(index=range(leaf_fc.size))
    p_sd, l_sd = strategy_sd(strategy_of_parent, parent_of_child, base, parent_fc, leaf_fc, tree_sd)
    bounds = coherent_intervals(levels, parent_fc, leaf_fc, parent_of_child, p_sd, l_sd, parent_zero, leaf_zero)
    return interval_frame(levels, bounds[0], bounds[1]), interval_frame(levels, bounds[2], bounds[3])


class CoverageBook:
    """The backtest's running coverage counts: per strategy, grain and level, the actual cells inside the
    bounds and the cells scored, per class (`leaf_intervals.interval_coverage` counts the same way)."""

    def __init__(self, levels: Sequence[float], n_classes: int):
        self.levels = tuple(levels)
        self.n_classes = n_classes
        self.counts: dict[tuple[str, str], np.ndarray] = {}  # (strategy, grain) -> (L, 2, n_classes)

    def add(self, strategy, base, parent, leaf, parent_of_child, parent_actual, leaf_actual, p_cls, c_cls) -> None:
        """Score one origin's intervals of `strategy` (made as the cycle makes them) against the actuals."""
        if not self.levels:
            return
        p_sd, l_sd = strategy_sd(np.full(parent.shape[0], strategy, dtype=object), parent_of_child, base, parent, leaf)
        lo_p, hi_p, lo_l, hi_l = coherent_intervals(self.levels, parent, leaf, parent_of_child, p_sd, l_sd)
        for grain, lo, hi, actual, cls in (("parent", lo_p, hi_p, parent_actual, p_cls),
                                           ("leaf", lo_l, hi_l, leaf_actual, c_cls)):
            book = self.counts.setdefault((strategy, grain), np.zeros((len(self.levels), 2, self.n_classes)))
            for i in range(len(self.levels)):  # a loop over the levels
                scored = np.isfinite(actual) & np.isfinite(lo[i]) & np.isfinite(hi[i])
                inside = scored & (actual >= lo[i]) & (actual <= hi[i])
                np.add.at(book[i, 0], cls, inside.sum(axis=1))
                np.add.at(book[i, 1], cls, scored.sum(axis=1))

    def rows(self, classes, c_cls, p_cls, n_origins: int, h: int):
        """The coverage rows of the accuracy table (metric `coverage_<level>`), classes with series only; the
        cells inside the bounds and the cells scored as numerator and denominator (additive over shards)."""
        import pandas as pd

        from pipelines.vocabulary import coverage_metric

        n = len(classes)
        counts = {"leaf": np.bincount(c_cls, minlength=n), "parent": np.bincount(p_cls, minlength=n)}
        out = []
        for (strategy, grain), book in self.counts.items():
            for i, level in enumerate(self.levels):
                value = np.divide(book[i, 0], book[i, 1], out=np.full(len(classes), np.nan), where=book[i, 1] > 0)
                for k, name in enumerate(classes):
                    if counts[grain][k] > 0:
                        out.append((name, strategy, grain, coverage_metric(level), float(value[k]), n_origins, h,
                                    int(counts[grain][k]), float(book[i, 0, k]), float(book[i, 1, k])))
        columns = ["product_class", "strategy", "grain", "metric", "value", "origins", "horizon", "series"]
        return pd.DataFrame(out, columns=columns + ["numerator", "denominator"])
