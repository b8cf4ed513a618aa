"""Coherent leaf and parent forecasts: the strategies the backtest compares.

Every parent (product x site) with its customers is a small two-level
hierarchy: the parent P and its n children, with summing matrix
S = [1'; I_n] (size (n + 1) x n). Each strategy turns base forecasts into a
parent forecast F_P,h and leaf forecasts f_j,h with sum_j f_j,h = F_P,h:

- `top_down`: the parent's base forecast split by a basis (the share table,
  or the reinitialized target): f_j = F_P x b_j / sum_k b_k.
- `forecast_proportions`: the parent's base forecast split in proportion to
  the children's own base forecasts, period by period (Athanasopoulos, Ahmed &
  Hyndman 2009): f_j,h = F_P,h x f^_j,h / sum_k f^_k,h. Where the children's
  base forecasts sum to 0 the fallback basis (shares) is used.
- `bottom_up`: the children's base forecasts, F_P = sum_j f^_j.
- `mint_shrink`, `wls_var`: optimal reconciliation (Wickramasuriya,
  Athanasopoulos & Hyndman 2019), y~ = S (S'W^-1 S)^-1 S'W^-1 y^ with W the
  covariance of the in-sample one-step residuals of all n + 1 series:
  `mint_shrink` shrinks its off-diagonal towards 0 (Schaefer & Strimmer 2005),
  `wls_var` keeps only its diagonal. (`wls_struct`, W = diag(S 1), and `ols`,
  W = I, need no residuals and are offered for tests and comparison.)

MinT is computed per parent in its projection form: with the one constraint
c'y = 0, c = (1, -1, ..., -1), y~ = y^ - W c (c'y^) / (c'W c), which equals
the S-form above for any positive definite W. Parents are batched by their
number of children, so the work is a few batched matrix products, not a loop
over parents.

Active children: a child outside its span (or its product's) in a period is
not part of its parent's hierarchy in that period. With `active` given, every
strategy works on the active children only: their base forecasts and basis
are 0 elsewhere, and MinT reconciles each period on the sub-hierarchy of the
parent and its active children (the rows and columns of W of the inactive
children dropped), so an inactive child gets 0 and takes no volume.

The parent each strategy produces is kept as it is (`Coherent.parent`): the
parent's base forecast for `top_down` and `forecast_proportions`, the
reconciled parent row of the projection for MinT / WLS, the sum of the
(active) children's base forecasts for `bottom_up`. The leaves are made to
sum to it; `pipelines.stages.reconciliation` proves they do, against this
value, not against a sum of the leaves.

Non-negativity: reconciled values can be negative (a child whose base
forecast is 0 is pulled below 0 when the parent is under the children's sum).
`nonnegative_keeping_parent` sets such leaves to 0 and takes the amount they
held below 0 from the other children of that parent and period, in
proportion to their reconciled values, so the reconciled parent keeps its
volume: f_j = F~_P x max(f~_j, 0) / sum_k max(f~_k, 0). This is the
forecast-proportions split of Athanasopoulos, Ahmed & Hyndman (2009) applied
to the reconciled parent with the non-negative parts of the reconciled
leaves as the proportions (it equals hierarchicalforecast's
`TopDown(method="forecast_proportions")` on that two-level tree; the test
names it). Where no reconciled leaf is above 0 the fallback basis (the
shares) splits the parent; a negative reconciled parent cannot be carried by
non-negative leaves and is left for the checks to report. (A constrained
optimum, Wickramasuriya, Athanasopoulos & Hyndman 2020, would need a QP per
parent and period; the proportional rule keeps the parent exactly, moves only
the parent periods that had a negative leaf, and is reported: count, parent
periods and volume moved.)
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numba import njit

MINT_RIDGE = 2e-8  # added to W's diagonal, as hierarchicalforecast's mint_shr_ridge and wls_var do
RECONCILE_METHODS = ("mint_shrink", "wls_var", "wls_struct", "ols")


def parent_sums(leaf: np.ndarray, parent_of_child: np.ndarray, n_parents: int) -> np.ndarray:
    """(n_parents, h) sums of the (n_children, h) leaf values per parent (bottom-up).

    The sums of `np.add.at(np.zeros(...), parent_of_child, leaf)`, bit for bit: one compiled pass over the
    children in their order adds each child's row to its parent's, from 0.0, as `add.at` does (several times
    faster: `add.at` goes through a generic loop per row). parent_of_child: codes 0..n_parents-1.
    """
    leaf = np.asarray(leaf)
    code = np.asarray(parent_of_child)
    if len(code) and (int(code.min()) < 0 or int(code.max()) >= n_parents):
        raise IndexError(f"parent codes must lie in 0..{n_parents - 1}, got {int(code.min())}..{int(code.max())}")
    width = int(np.prod(leaf.shape[1:], dtype=np.int64))
    rows = np.ascontiguousarray(leaf.reshape(len(leaf), width), dtype=np.float64)
    return _rows_summed(rows, code.astype(np.intp, copy=False), n_parents).reshape((n_parents,) + leaf.shape[1:])


@njit(cache=True)
def _rows_summed(rows, code, n):
    out = np.zeros((n, rows.shape[1]))
    for i in range(rows.shape[0]):
        p = code[i]
        for j in range(rows.shape[1]):
            out[p, j] += rows[i, j]
    return out


def split_by_basis(
    parent: np.ndarray, basis: np.ndarray, parent_of_child: np.ndarray, fallback: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """Leaf values (n_children, h) = parent value x basis / sum of the basis over the parent's children.

    parent: (n_parents, h); basis, fallback: (n_children, h), non-negative.
    Where a parent's basis sums to 0 in a period, `fallback` is the basis there
    (where it too sums to 0, the children get 0). Returns the leaf values and a
    boolean (n_children, h) mask of the cells that used the fallback.
    """
    n_parents = parent.shape[0]
    total = parent_sums(basis, parent_of_child, n_parents)[parent_of_child]
    used_fallback = total <= 0
    if fallback is not None:
        fb_total = parent_sums(fallback, parent_of_child, n_parents)[parent_of_child]
        basis = np.where(used_fallback, fallback, basis)
        total = np.where(used_fallback, fb_total, total)
    weight = np.divide(basis, total, out=np.zeros_like(basis, dtype=float), where=total > 0)
    return parent[parent_of_child] * weight, used_fallback


def shrunk_covariance(residuals: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Schaefer & Strimmer (2005) shrinkage of the residual covariance, batched.

    residuals: (G, m, T), G hierarchies of m series over T periods.
    Returns W (G, m, m) and the shrinkage intensity lambda (G,):
    W_ii = s_ii, W_ij = (1 - lambda) s_ij (i != j), with s the sample covariance
    (ddof = 1) and
        lambda = sum_{i != j} Var(r_ij) / sum_{i != j} r_ij^2,
    r_ij the correlations, estimated from the standardized residuals z as
    Var(r_ij) / r_ij^2 = sum_t (w_tij - mean_t w_ij)^2 / (T (T - 1) mean_t(w_ij)^2),
    w_tij = z_ti z_tj; lambda clipped to [0, 1]. A series with zero variance
    has z = 0 (it adds nothing to either sum). This is the estimator
    Wickramasuriya et al. (2019) use for MinT(Shrink).
    """
    g, m, t = residuals.shape
    centred = residuals - residuals.mean(axis=2, keepdims=True)
    cov = centred @ centred.transpose(0, 2, 1) / max(t - 1, 1)
    std = centred.std(axis=2, keepdims=True)
    z = np.divide(centred, std, out=np.zeros_like(centred), where=std > 0)
    mean_w = z @ z.transpose(0, 2, 1) / t  # (G, m, m)
    z2 = z**2
    sum_w2 = z2 @ z2.transpose(0, 2, 1)  # sum_t w_tij^2
    off = ~np.eye(m, dtype=bool)
    numerator = ((sum_w2 - t * mean_w**2) * off).sum(axis=(1, 2)) / max(t * (t - 1), 1)
    denominator = ((mean_w**2) * off).sum(axis=(1, 2))
    lam = np.clip(np.divide(numerator, denominator, out=np.ones(g), where=denominator > 0), 0.0, 1.0)
    w = cov * np.where(off, (1.0 - lam)[:, None, None], 1.0)
    return w, lam


def _weight_matrices(method: str, residuals: np.ndarray | None, n_children: int, g: int) -> np.ndarray:
    """W (G, m, m) for one batch of G parents that each have `n_children` children."""
    m = n_children + 1
    if method == "ols":
        w = np.broadcast_to(np.eye(m), (g, m, m)).copy()
    elif method == "wls_struct":
        w = np.broadcast_to(np.diag(np.r_[float(n_children), np.ones(n_children)]), (g, m, m)).copy()
    elif method == "wls_var":
        assert residuals is not None
        w = np.zeros((g, m, m))
        idx = np.arange(m)
        w[:, idx, idx] = (residuals**2).mean(axis=2)
    elif method == "mint_shrink":
        assert residuals is not None
        w, _ = shrunk_covariance(residuals)
    else:
        raise ValueError(f"unknown reconciliation method {method!r}; choose from {list(RECONCILE_METHODS)}")
    if method in ("wls_var", "mint_shrink"):
        idx = np.arange(m)
        w[:, idx, idx] += MINT_RIDGE
    return w


def mint_reconcile(
    parent_fc: np.ndarray,
    leaf_fc: np.ndarray,
    parent_of_child: np.ndarray,
    method: str,
    parent_residuals: np.ndarray | None = None,
    leaf_residuals: np.ndarray | None = None,
    active: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Reconciled (parent, leaf) forecasts, each parent with its children on its own.

    parent_fc: (n_parents, h) base forecasts; leaf_fc: (n_children, h);
    parent_of_child: (n_children,) parent code of each child (0..n_parents-1);
    parent_residuals, leaf_residuals: (n_parents, T) and (n_children, T)
    in-sample one-step residuals y - y^ over a common window of T periods
    (needed by `mint_shrink` and `wls_var`; NaN counts as 0); active:
    optional (n_children, h) bool, the children that belong to their parent's
    hierarchy in each period (None = all).
    Returns the reconciled parent row of the projection (not a sum of the
    leaves; the two agree up to rounding) and the reconciled leaves, 0 where a
    child is not active. A parent without children keeps its base forecast.

    With `active`, a period's hierarchy holds the parent and its active
    children only: c_h = (1, -a_1h, ..., -a_nh), and the projection
    y~ = y^ - W c_h (c_h'y^) / (c_h'W c_h) restricted to the active rows equals
    MinT on the sub-hierarchy with W's rows and columns of the inactive
    children dropped (c_h is 0 there).
    """
    if method not in RECONCILE_METHODS:
        raise ValueError(f"unknown reconciliation method {method!r}; choose from {list(RECONCILE_METHODS)}")
    needs_residuals = method in ("mint_shrink", "wls_var")
    if needs_residuals and (parent_residuals is None or leaf_residuals is None):
        raise ValueError(f"{method} needs the in-sample residuals of parents and leaves")
    n_parents, n_children = parent_fc.shape[0], leaf_fc.shape[0]
    sizes = np.bincount(parent_of_child, minlength=n_parents)
    order = np.argsort(parent_of_child, kind="stable")  # children grouped by parent
    first = np.concatenate([[0], np.cumsum(sizes)[:-1]])
    rank = np.empty(n_children, dtype=np.int64)
    rank[order] = np.arange(n_children) - first[parent_of_child[order]]
    leaf_out = leaf_fc.astype(float).copy()
    parent_out = parent_fc.astype(float).copy()
    if needs_residuals:
        pr = np.nan_to_num(np.asarray(parent_residuals, dtype=float))
        lr = np.nan_to_num(np.asarray(leaf_residuals, dtype=float))
    for n in np.unique(sizes[sizes > 0]):  # one batch per family size, a handful of sizes
        ps = np.flatnonzero(sizes == n)
        g = len(ps)
        # child index table (G, n): children of each parent in their stable order
        table = np.empty((n_parents, int(n)), dtype=np.int64)
        members = np.isin(parent_of_child, ps)
        table[parent_of_child[members], rank[members]] = np.flatnonzero(members)
        kids = table[ps]
        y = np.concatenate([parent_fc[ps][:, None, :], leaf_fc[kids]], axis=1)  # (G, m, h)
        res = None
        if needs_residuals:
            res = np.concatenate([pr[ps][:, None, :], lr[kids]], axis=1)  # (G, m, T)
        w = _weight_matrices(method, res, int(n), g)
        if active is None or active[kids].all():
            c = np.r_[1.0, -np.ones(int(n))]
            wc = w @ c  # (G, m)
            cwc = wc @ c  # (G,)
            gap = np.einsum("m,gmh->gh", c, y)  # parent minus sum of children
            ratio = np.divide(gap, cwc[:, None], out=np.zeros_like(gap), where=cwc[:, None] > 0)
            reconciled = y - wc[:, :, None] * ratio[:, None, :]
        else:
            a = active[kids]  # (G, n, h)
            y[:, 1:, :] = np.where(a, y[:, 1:, :], 0.0)
            cm = np.concatenate([np.ones((g, 1, a.shape[2])), -a.astype(float)], axis=1)  # (G, m, h): c_h
            wcm = w @ cm  # (G, m, h): W c_h
            cwc = (cm * wcm).sum(axis=1)  # (G, h)
            gap = (cm * y).sum(axis=1)
            ratio = np.divide(gap, cwc, out=np.zeros_like(gap), where=cwc > 0)
            reconciled = y - wcm * ratio[:, None, :]
            reconciled[:, 1:, :] = np.where(a, reconciled[:, 1:, :], 0.0)
        leaf_out[kids] = reconciled[:, 1:, :]
        parent_out[ps] = reconciled[:, 0, :]
    return parent_out, leaf_out


def nonnegative_keeping_parent(
    parent: np.ndarray, leaf: np.ndarray, parent_of_child: np.ndarray, fallback: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray, int]:
    """Leaves >= 0 that still sum to `parent`: negative leaves set to 0, their amount taken from the others.

    parent: (n_parents, h); leaf: (n_children, h). In every parent period
    with a negative leaf, f_j = F_P x max(f_j, 0) / sum_k max(f_k, 0)
    (Athanasopoulos, Ahmed & Hyndman 2009, forecast proportions, on the
    reconciled values); where no leaf is above 0, F_P is split by `fallback`
    (n_children, h; children get 0 where it too sums to 0). A negative F_P
    leaves its leaves at 0 (no non-negative split reaches it; the checks
    report it). Other parent periods are returned untouched.
    Returns the leaves, the (n_parents, h) volume moved (the sum of the
    negative values set to 0, as a positive number) and the count of leaf
    values set from negative to 0.
    """
    n_parents = parent.shape[0]
    negative = leaf < 0
    moved = parent_sums(np.where(negative, -leaf, 0.0), parent_of_child, n_parents)
    touched = (moved > 0)[parent_of_child]
    if not touched.any():
        return leaf, moved, 0
    positive = np.clip(leaf, 0.0, None)
    split, _ = split_by_basis(np.clip(parent, 0.0, None), positive, parent_of_child, fallback=fallback)
    return np.where(touched, split, leaf), moved, int(negative.sum())


NEEDS_PARENT = ("top_down", "forecast_proportions", "mint_shrink", "wls_var")
NEEDS_LEAF = ("bottom_up", "forecast_proportions", "mint_shrink", "wls_var")
NEEDS_RESIDUALS = ("mint_shrink", "wls_var")
# what a leaf came from, by its code in `Coherent.source`
SOURCES = ("basis", "children_forecast", "leaf_forecast", "reconciled")
BASIS, CHILDREN_FORECAST, LEAF_FORECAST, RECONCILED = range(len(SOURCES))


@dataclass(frozen=True)
class Coherent:
    """One strategy's output. parent (n_parents, h): the parent as the strategy produced it; leaf
    (n_children, h): leaves summing to it, >= 0; source (n_children, h): what each leaf came from, the code
    (uint8) of its word in SOURCES ("basis", "children_forecast", "leaf_forecast", "reconciled": one byte a
    cell, not an object); negatives: reconciled leaf values set from negative to
    0; moved (n_parents, h): the volume those held below 0, taken from the other children of the period."""

    parent: np.ndarray
    leaf: np.ndarray
    source: np.ndarray  # (n_children, h) uint8 codes of SOURCES
    negatives: int
    moved: np.ndarray


def coherent(
    strategy: str,
    parent_fc: np.ndarray,
    leaf_fc: np.ndarray,
    parent_of_child: np.ndarray,
    basis: np.ndarray,
    parent_residuals: np.ndarray | None = None,
    leaf_residuals: np.ndarray | None = None,
    active: np.ndarray | None = None,
) -> Coherent:
    """Parent (n_parents, h) and leaf (n_children, h) forecasts of one strategy, leaves >= 0 summing to the parent.

    parent_fc, leaf_fc: base forecasts, already >= 0 (a strategy ignores the
    grain it does not use); basis: (n_children, h) top-down basis (share or
    target), also the fallback of `forecast_proportions` and of the
    non-negative MinT split; active: optional (n_children, h) bool, the
    children in their parent's hierarchy in each period (None = all). The
    parent is the strategy's own (module docstring); where no active child can
    take any of it (top-down basis or both forecast-proportions bases all 0)
    the leaves are 0 and the parent keeps its value, for the lifecycle or the
    checks to account for.
    """
    n_parents = parent_fc.shape[0]
    if active is not None:
        basis = np.where(active, basis, 0.0)
        if strategy != "top_down":  # the one strategy that reads no leaf forecast
            leaf_fc = np.where(active, leaf_fc, 0.0)
    none_moved = np.zeros(parent_fc.shape)
    if strategy == "top_down":
        leaf, _ = split_by_basis(parent_fc, basis, parent_of_child)
        return Coherent(parent_fc.copy(), leaf, _sources(leaf.shape, BASIS), 0, none_moved)
    if strategy == "forecast_proportions":
        leaf, fell_back = split_by_basis(parent_fc, leaf_fc, parent_of_child, fallback=basis)
        source = np.where(fell_back, BASIS, CHILDREN_FORECAST).astype(np.uint8)
        return Coherent(parent_fc.copy(), leaf, source, 0, none_moved)
    if strategy == "bottom_up":
        source = _sources(leaf_fc.shape, LEAF_FORECAST)
        return Coherent(parent_sums(leaf_fc, parent_of_child, n_parents), leaf_fc.copy(), source, 0, none_moved)
    if strategy in NEEDS_RESIDUALS:
        parent, leaf = mint_reconcile(
            parent_fc, leaf_fc, parent_of_child, strategy, parent_residuals, leaf_residuals, active
        )
        leaf, moved, negatives = nonnegative_keeping_parent(parent, leaf, parent_of_child, basis)
        return Coherent(parent, leaf, _sources(leaf.shape, RECONCILED), negatives, moved)
    raise ValueError(f"unknown strategy {strategy!r}; choose from {list(dict.fromkeys(NEEDS_PARENT + NEEDS_LEAF))}")


def _sources(shape: tuple[int, ...], code: int) -> np.ndarray:
    return np.full(shape, code, dtype=np.uint8)


def coherent_forecasts(
    strategy: str,
    parent_fc: np.ndarray,
    leaf_fc: np.ndarray,
    parent_of_child: np.ndarray,
    basis: np.ndarray,
    parent_residuals: np.ndarray | None = None,
    leaf_residuals: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, int]:
    """`coherent` with every child active, as (parent, leaf, source, negatives set to 0) (the backtest's use)."""
    out = coherent(strategy, parent_fc, leaf_fc, parent_of_child, basis, parent_residuals, leaf_residuals)
    return out.parent, out.leaf, out.source, out.negatives
