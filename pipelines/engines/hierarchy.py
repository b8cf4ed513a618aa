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

Non-negativity: reconciled values can be negative (a child whose base
forecast is 0 is pulled below 0 when the parent is under the children's sum).
`clip_and_resum` sets negative leaves to 0 and re-sums the parent from its
leaves, so the result stays coherent; the count of values set to 0 is
reported. (A constrained optimum would need a QP per parent; the clip is the
documented simpler rule.)
"""

from __future__ import annotations

import numpy as np

MINT_RIDGE = 2e-8  # added to W's diagonal, as hierarchicalforecast's mint_shr_ridge and wls_var do
RECONCILE_METHODS = ("mint_shrink", "wls_var", "wls_struct", "ols")


def parent_sums(leaf: np.ndarray, parent_of_child: np.ndarray, n_parents: int) -> np.ndarray:
    """(n_parents, h) sums of the (n_children, h) leaf values per parent (bottom-up)."""
    out = np.zeros((n_parents,) + leaf.shape[1:])
    np.add.at(out, parent_of_child, leaf)
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
) -> tuple[np.ndarray, np.ndarray]:
    """Reconciled (parent, leaf) forecasts, each parent with its children on its own.

    parent_fc: (n_parents, h) base forecasts; leaf_fc: (n_children, h);
    parent_of_child: (n_children,) parent code of each child (0..n_parents-1);
    parent_residuals, leaf_residuals: (n_parents, T) and (n_children, T)
    in-sample one-step residuals y - y^ over a common window of T periods
    (needed by `mint_shrink` and `wls_var`; NaN counts as 0).
    A parent without children keeps its base forecast. The parent returned is
    the sum of the reconciled leaves (equal to the reconciled parent up to
    rounding).
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
        c = np.r_[1.0, -np.ones(int(n))]
        wc = w @ c  # (G, m)
        cwc = wc @ c  # (G,)
        gap = np.einsum("m,gmh->gh", c, y)  # parent minus sum of children
        ratio = np.divide(gap, cwc[:, None], out=np.zeros_like(gap), where=cwc[:, None] > 0)
        reconciled = y - wc[:, :, None] * ratio[:, None, :]
        leaf_out[kids] = reconciled[:, 1:, :]
    parent_out = parent_sums(leaf_out, parent_of_child, n_parents)
    lone = sizes == 0
    parent_out[lone] = parent_fc[lone]
    return parent_out, leaf_out


def clip_and_resum(
    parent: np.ndarray, leaf: np.ndarray, parent_of_child: np.ndarray
) -> tuple[np.ndarray, np.ndarray, int]:
    """Negative leaves set to 0 and the parents re-summed from their leaves; returns the count set to 0.

    Parents without children keep their own value, clipped at 0.
    """
    negatives = int((leaf < 0).sum())
    leaf = np.clip(leaf, 0.0, None)
    sums = parent_sums(leaf, parent_of_child, parent.shape[0])
    has_children = np.bincount(parent_of_child, minlength=parent.shape[0]) > 0
    negatives += int((parent[~has_children] < 0).sum())
    out = np.where(has_children[:, None], sums, np.clip(parent, 0.0, None))
    return out, leaf, negatives


NEEDS_PARENT = ("top_down", "forecast_proportions", "mint_shrink", "wls_var")
NEEDS_LEAF = ("bottom_up", "forecast_proportions", "mint_shrink", "wls_var")
NEEDS_RESIDUALS = ("mint_shrink", "wls_var")


def coherent_forecasts(
    strategy: str,
    parent_fc: np.ndarray,
    leaf_fc: np.ndarray,
    parent_of_child: np.ndarray,
    basis: np.ndarray,
    parent_residuals: np.ndarray | None = None,
    leaf_residuals: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, int]:
    """Parent (n_parents, h) and leaf (n_children, h) forecasts of one strategy, coherent and >= 0.

    parent_fc, leaf_fc: base forecasts, already >= 0 (a strategy ignores the
    grain it does not use); basis: (n_children, h) top-down basis (share or
    target), also the fallback of `forecast_proportions`. Returns parent, leaf,
    a (n_children, h) code of what each leaf value came from ("basis",
    "children_forecast", "leaf_forecast", "reconciled") and the number of
    reconciled values set from negative to 0.
    """
    n_parents = parent_fc.shape[0]
    if strategy == "top_down":
        leaf, _ = split_by_basis(parent_fc, basis, parent_of_child)
        parent = parent_sums(leaf, parent_of_child, n_parents)
        # a parent whose basis is all 0 passes nothing down; keep the sum so the pair stays coherent
        source = np.full(leaf.shape, "basis", dtype=object)
        return parent, leaf, source, 0
    if strategy == "forecast_proportions":
        leaf, fell_back = split_by_basis(parent_fc, leaf_fc, parent_of_child, fallback=basis)
        source = np.where(fell_back, "basis", "children_forecast").astype(object)
        return parent_sums(leaf, parent_of_child, n_parents), leaf, source, 0
    if strategy == "bottom_up":
        source = np.full(leaf_fc.shape, "leaf_forecast", dtype=object)
        return parent_sums(leaf_fc, parent_of_child, n_parents), leaf_fc.copy(), source, 0
    if strategy in NEEDS_RESIDUALS:
        parent, leaf = mint_reconcile(parent_fc, leaf_fc, parent_of_child, strategy, parent_residuals, leaf_residuals)
        parent, leaf, negatives = clip_and_resum(parent, leaf, parent_of_child)
        source = np.full(leaf.shape, "reconciled", dtype=object)
        return parent, leaf, source, negatives
    raise ValueError(f"unknown strategy {strategy!r}; choose from {list(dict.fromkeys(NEEDS_PARENT + NEEDS_LEAF))}")
