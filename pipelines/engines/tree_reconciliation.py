"""Optimal reconciliation over a tree of any depth, with coherent normal prediction intervals.

A tree (or a forest) of aggregation levels above the leaves - e.g. total >
region > parent (product x site) > leaf (customer) - is given by integer
parent codes per level (`tree_from_parent_codes`). Nodes are numbered top
level first, leaves last (the row order of hierarchicalforecast's summing
matrix S, n_nodes x n_leaves), so nodes 0..n_aggregates-1 are the aggregates.

**Point forecasts** (Wickramasuriya, Athanasopoulos & Hyndman 2019, "Optimal
forecast reconciliation for hierarchical and grouped time series through trace
minimization", JASA 114(526)): y~ = S P y^, P = (S' W^-1 S)^-1 S' W^-1, with W
the covariance of the base forecast errors: `ols` W = I, `wls_struct` W =
diag(S 1) (leaves under each node), `wls_var` W = diag of the in-sample
residuals' mean squares, `mint_shrink` the Schaefer & Strimmer (2005) shrunk
residual covariance. As the two-level strategies of the cycle, it is computed
in its projection form: with C the (n_aggregates x n_nodes) constraint matrix
(one row per aggregate node: the node minus its children),
    y~ = y^ - W C' (C W C')^-1 C y^,
which equals S P y^ for any positive definite W. `bottom_up` sums the leaves'
base forecasts. The returned values are made exactly coherent by re-summing
the reconciled leaves with S. Ridge 2e-8 on W's diagonal for `wls_var` and
`mint_shrink`, as hierarchicalforecast does; NaN residuals count as 0.

**Two paths, and what scales.**
- Diagonal W (`ols`, `wls_struct`, `wls_var`) on the whole tree at once:
  C W C' is then (n_aggregates x n_aggregates) with the tree's own sparsity
  (a node, its parent and its child aggregates), factorised once with a
  sparse LU and solved for all h periods. Work and memory grow linearly with
  the nodes: this is the path for a whole-class tree of 100,000 parents and
  1,000,000 leaves (figures in benchmarks/README.md).
- Dense W (`mint_shrink`) within each top-level tree (a component of the
  forest): W, C W C' and the projection are dense per component, batched
  across components of similar size (padded at most 25 %: padding nodes
  have no constraint and padding constraints are identity rows, so they change
  nothing). Cost per component O(n^3 + n^2 T) for n nodes and T residual
  periods, memory n^2: a component of a few thousand nodes at most
  (`max_dense_nodes`). A whole-class tree with a single total cannot use a
  dense covariance (1.1 million nodes squared is 10 TB); MinT-shrink is for
  bounded components (a parent and its children, a product across its sites),
  with the levels above reconciled by WLS, or for slices of the class.

**Prediction intervals** (normal approximation: Wickramasuriya et al. 2019;
Panagiotelis, Gamakumara, Athanasopoulos & Hyndman 2023, "Probabilistic
forecast reconciliation: properties, evaluation and score optimisation", EJOR
305(2)): with base forecast standard deviations sigma_h (n_nodes, h) and R the
correlation matrix of W, the reconciled covariance of period h is
    S P (D_h R D_h) P' S',   D_h = diag(sigma_h),
as hierarchicalforecast's `Normality` computes it; the bounds of level L are
y~ +- z_{0.5 + L/200} sd. Only its diagonal is needed, but P is dense within a
component, so intervals take the dense path (per component, any method).
`bottom_up`: the leaves' base distribution summed: independent leaves
(R = I, as hierarchicalforecast's `BottomUp`) or, with
`leaf_correlation="shrunk"`, correlated by the shrunk residual correlation.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Literal

import numpy as np
import scipy.sparse as sp
from scipy.sparse.linalg import splu

from pipelines.engines.hierarchy import MINT_RIDGE, shrunk_covariance

METHODS = ("ols", "wls_struct", "wls_var", "mint_shrink", "bottom_up")
DIAGONAL = ("ols", "wls_struct", "wls_var")
DENSE_BUDGET_BYTES = 256 * 2**20  # per batch of padded components


@dataclass(frozen=True)
class Tree:
    """A forest of aggregation levels over the leaves, nodes numbered top level first, leaves last.

    level_sizes: nodes per level, top first; offsets: (n_levels + 1,) first
    node id of each level; parent: (n_nodes,) parent node id, -1 at the top;
    root: (n_nodes,) the top-level node (0..level_sizes[0]-1) each node
    belongs to, i.e. its component; leaf_ancestors: (n_levels, n_leaves) node
    id of each leaf's ancestor on every level, top first, the last row the
    leaves' own node ids.
    """

    level_sizes: tuple[int, ...]
    offsets: np.ndarray
    parent: np.ndarray
    root: np.ndarray
    leaf_ancestors: np.ndarray

    @property
    def n_nodes(self) -> int:
        return int(self.offsets[-1])

    @property
    def n_leaves(self) -> int:
        return self.level_sizes[-1]

    @property
    def n_aggregates(self) -> int:
        return self.n_nodes - self.n_leaves

    def summing_matrix(self) -> sp.csr_matrix:
        """S (n_nodes x n_leaves), sparse: S[i, j] = 1 when leaf j is under node i (or is i)."""
        rows = self.leaf_ancestors.ravel()
        cols = np.tile(np.arange(self.n_leaves), len(self.level_sizes))
        return sp.csr_matrix((np.ones(len(rows)), (rows, cols)), shape=(self.n_nodes, self.n_leaves))

    def constraint_matrix(self) -> sp.csr_matrix:
        """C (n_aggregates x n_nodes), sparse: row a is node a minus its children; C y = 0 iff y is coherent."""
        child = np.flatnonzero(self.parent >= 0)
        rows = np.r_[np.arange(self.n_aggregates), self.parent[child]]
        cols = np.r_[np.arange(self.n_aggregates), child]
        vals = np.r_[np.ones(self.n_aggregates), -np.ones(len(child))]
        return sp.csr_matrix((vals, (rows, cols)), shape=(self.n_aggregates, self.n_nodes))

    def sums(self, leaf_values: np.ndarray) -> np.ndarray:
        """(n_nodes, ...) every node's sum of its leaves' values (leaf_values: (n_leaves, ...))."""
        leaf_values = np.asarray(leaf_values, dtype=float)
        flat = leaf_values.reshape(self.n_leaves, -1)
        return np.asarray(self.summing_matrix() @ flat).reshape((self.n_nodes,) + leaf_values.shape[1:])

    def coherence_gaps(self, values: np.ndarray) -> np.ndarray:
        """(n_aggregates, ...) each aggregate's value minus the sum of its children's (0 when coherent)."""
        values = np.asarray(values, dtype=float)
        flat = values.reshape(self.n_nodes, -1)
        return np.asarray(self.constraint_matrix() @ flat).reshape((self.n_aggregates,) + values.shape[1:])


def tree_from_parent_codes(codes: Sequence[np.ndarray], n_top: int | None = None) -> Tree:
    """The tree whose levels are linked by integer parent codes, given bottom-up.

    codes[0]: (n_leaves,) code of each leaf's parent on the level above;
    codes[k]: (n_k,) code of each node of level k (counted from the leaves)
    on level k + 1; the top level has n_top nodes (default: largest code + 1).
    E.g. leaves -> parents -> regions -> total: [parent_of_leaf,
    region_of_parent, np.zeros(n_regions)]. Every node above the leaves
    must have at least one child.
    """
    if len(codes) == 0:
        raise ValueError("tree_from_parent_codes: give at least one level of parent codes (the leaves' parents)")
    codes = [np.asarray(c) for c in codes]
    for k, c in enumerate(codes):
        if c.ndim != 1 or not np.issubdtype(c.dtype, np.integer):
            raise ValueError(
                f"tree_from_parent_codes: codes[{k}] must be a 1-d integer array, got dtype {c.dtype} shape {c.shape}"
            )
    sizes_up = [len(codes[0])] + [len(c) for c in codes[1:]]
    top = int(codes[-1].max()) + 1 if n_top is None and len(codes[-1]) else (n_top or 0)
    sizes_up.append(top)
    for k, c in enumerate(codes):
        if len(c) and (c.min() < 0 or c.max() >= sizes_up[k + 1]):
            raise ValueError(
                f"tree_from_parent_codes: codes[{k}] must lie in 0..{sizes_up[k + 1] - 1} (the {sizes_up[k + 1]} nodes "
                f"of the level above), found {int(c.min())}..{int(c.max())}"
            )
        children = np.bincount(c, minlength=sizes_up[k + 1])
        empty = np.flatnonzero(children == 0)
        if len(empty):
            raise ValueError(
                f"tree_from_parent_codes: {len(empty)} node(s) of level {k + 1} (counted from the leaves) have no "
                f"children, e.g. codes {empty[:10].tolist()}; drop them or renumber the level densely"
            )
    n_levels = len(sizes_up)
    level_sizes = tuple(reversed(sizes_up))  # top first
    offsets = np.r_[0, np.cumsum(level_sizes)].astype(np.int64)

    def node(level_up: int, code: np.ndarray) -> np.ndarray:  # level counted from the leaves
        return offsets[n_levels - 1 - level_up] + code

    parent = np.full(int(offsets[-1]), -1, dtype=np.int64)
    for k, c in enumerate(codes):  # a loop over levels
        parent[node(k, np.arange(sizes_up[k]))] = node(k + 1, c)
    ancestors = [np.arange(sizes_up[0])]
    for c in codes:
        ancestors.append(c[ancestors[-1]])
    leaf_ancestors = np.vstack([node(k, a) for k, a in enumerate(ancestors)][::-1])
    root = np.empty(int(offsets[-1]), dtype=np.int64)
    root[: level_sizes[0]] = np.arange(level_sizes[0])
    for lv in range(1, n_levels):  # top-down, a loop over levels
        ids = np.arange(offsets[lv], offsets[lv + 1])
        root[ids] = root[parent[ids]]
    return Tree(level_sizes=level_sizes, offsets=offsets, parent=parent, root=root, leaf_ancestors=leaf_ancestors)


@dataclass(frozen=True)
class TreeReconciliation:
    """values: (n_nodes, h) coherent forecasts; sd: (n_nodes, h) reconciled standard deviations (None
    without sigma); shrinkage: (n_components,) lambda of `mint_shrink` (None otherwise); path: sparse or dense."""

    values: np.ndarray
    sd: np.ndarray | None
    shrinkage: np.ndarray | None
    path: str


def _diagonal_w(tree: Tree, method: str, residuals: np.ndarray | None) -> np.ndarray:
    if method == "ols":
        return np.ones(tree.n_nodes)
    if method == "wls_struct":
        return np.asarray(tree.summing_matrix().sum(axis=1)).ravel()
    res = np.nan_to_num(np.asarray(residuals, dtype=float))
    return (res**2).mean(axis=1) + MINT_RIDGE


def reconcile_tree(
    tree: Tree,
    base: np.ndarray,
    method: str,
    residuals: np.ndarray | None = None,
    sigma: np.ndarray | None = None,
    leaf_correlation: Literal["independent", "shrunk"] = "independent",
    dense: bool | None = None,
    max_dense_nodes: int = 4096,
) -> TreeReconciliation:
    """Coherent forecasts (and, with `sigma`, reconciled standard deviations) of every node.

    base: (n_nodes, h) base forecasts in node order; residuals: (n_nodes, T)
    in-sample one-step residuals (needed by `wls_var`, `mint_shrink` and by
    `leaf_correlation="shrunk"`); sigma: (n_nodes, h) base forecast standard
    deviations (only the leaves' are read by `bottom_up`); dense: force the
    dense per-component path (None = sparse where W is diagonal and no
    interval is asked for). Raises when a component is larger than
    `max_dense_nodes` on the dense path.
    """
    if method not in METHODS:
        raise ValueError(f"reconcile_tree: unknown method {method!r}; choose from {list(METHODS)}")
    base = np.asarray(base, dtype=float)
    if base.ndim != 2 or base.shape[0] != tree.n_nodes:
        raise ValueError(f"reconcile_tree: base must be (n_nodes={tree.n_nodes}, h), got shape {base.shape}")
    needs_res = method in ("wls_var", "mint_shrink") or (
        method == "bottom_up" and sigma is not None and leaf_correlation == "shrunk"
    )
    if needs_res and (residuals is None or np.asarray(residuals).shape[0] != tree.n_nodes):
        raise ValueError(f"reconcile_tree: {method} needs residuals of shape (n_nodes={tree.n_nodes}, T)")
    if sigma is not None and np.asarray(sigma).shape != base.shape:
        raise ValueError(
            f"reconcile_tree: sigma must have the shape of base {base.shape}, got {np.asarray(sigma).shape}"
        )
    if method == "bottom_up":
        values = tree.sums(base[tree.n_aggregates :])
        if sigma is None:
            return TreeReconciliation(values, None, None, "sparse")
        sigma = np.asarray(sigma, dtype=float)
        if leaf_correlation == "independent":
            sd = np.sqrt(tree.sums(sigma[tree.n_aggregates :] ** 2))
            return TreeReconciliation(values, sd, None, "sparse")
    use_dense = dense if dense is not None else (method not in DIAGONAL or sigma is not None)
    if not use_dense and method in DIAGONAL:
        return TreeReconciliation(_sparse_wls(tree, base, _diagonal_w(tree, method, residuals)), None, None, "sparse")
    if method == "bottom_up" and leaf_correlation not in ("independent", "shrunk"):
        raise ValueError(
            f"reconcile_tree: unknown leaf_correlation {leaf_correlation!r}; choose from ['independent', 'shrunk']"
        )
    values, sd, shrinkage = _dense(tree, base, method, residuals, sigma, max_dense_nodes)
    if method == "bottom_up":
        values = tree.sums(base[tree.n_aggregates :])
    else:
        values = tree.sums(values[tree.n_aggregates :])  # exactly coherent
    return TreeReconciliation(values, sd, shrinkage, "dense")


def _sparse_wls(tree: Tree, base: np.ndarray, w: np.ndarray) -> np.ndarray:
    """y^ - W C' (C W C')^-1 C y^ with diagonal W, on the whole forest at once; then re-summed from the leaves."""
    if tree.n_aggregates == 0:
        return base.copy()
    c = tree.constraint_matrix()
    k = (c @ sp.diags(w) @ c.T).tocsc()
    lam = splu(k, permc_spec="MMD_AT_PLUS_A").solve(np.asarray(c @ base))
    out = base - w[:, None] * np.asarray(c.T @ lam)
    return tree.sums(out[tree.n_aggregates :])


def _dense(tree: Tree, base, method, residuals, sigma, max_dense_nodes):
    """Per-component dense reconciliation, components batched by padded size."""
    n_top = tree.level_sizes[0]
    comp = tree.root
    size = np.bincount(comp, minlength=n_top)
    if size.max(initial=0) > max_dense_nodes:
        big = np.flatnonzero(size > max_dense_nodes)
        raise ValueError(
            f"reconcile_tree: {method} needs a dense matrix per top-level tree, and {len(big)} tree(s) have more than "
            f"max_dense_nodes={max_dense_nodes} nodes (largest {int(size.max())}, top-level node {int(big[0])}); "
            "use a diagonal method (wls_var, wls_struct) for the whole tree, or cut it into smaller trees"
        )
    order = np.argsort(comp, kind="stable")  # nodes by component, ascending id inside: aggregates first
    start = np.r_[0, np.cumsum(size)[:-1]]
    rank = np.empty(tree.n_nodes, dtype=np.int64)
    rank[order] = np.arange(tree.n_nodes) - start[comp[order]]
    n_agg = np.bincount(comp[: tree.n_aggregates], minlength=n_top)
    h = base.shape[1]
    res = None if residuals is None else np.nan_to_num(np.asarray(residuals, dtype=float))
    t = 0 if res is None else res.shape[1]
    values = np.zeros_like(base)
    sd = None if sigma is None else np.zeros_like(base)
    shrinkage = np.full(n_top, np.nan) if method == "mint_shrink" else None
    wdiag = _diagonal_w(tree, method, res) if method in DIAGONAL else None
    # pad each component to a size class at most 25 % larger: exact up to 8 nodes, then steps of 2^(k-2)
    step = np.maximum(1, 2 ** (np.floor(np.log2(np.maximum(size, 1))) - 2)).astype(np.int64)
    padded = np.maximum(2, -(-size // step) * step)
    by_size = np.argsort(padded, kind="stable")
    for m in np.unique(padded):  # a loop over a handful of padded sizes
        comps = by_size[padded[by_size] == m]
        per = max(1, DENSE_BUDGET_BYTES // (8 * (6 * m * m + 2 * m * (t + h))))
        for lo in range(0, len(comps), per):  # batches of components, bounded memory
            _dense_batch(
                tree,
                comps[lo : lo + per],
                int(m),
                order,
                start,
                size,
                rank,
                n_agg,
                base,
                method,
                res,
                sigma,
                wdiag,
                values,
                sd,
                shrinkage,
            )
    return values, sd, shrinkage


def _dense_batch(tree, cs, m, order, start, size, rank, n_agg, base, method, res, sigma, wdiag, values, sd, shrinkage):
    g_count = len(cs)
    counts = size[cs]
    within = np.arange(counts.sum()) - np.repeat(np.cumsum(counts) - counts, counts)
    nodes = order[np.repeat(start[cs], counts) + within]
    g = np.repeat(np.arange(g_count), counts)
    r = rank[nodes]
    a = int(n_agg[cs].max(initial=0))
    h = base.shape[1]
    y = np.zeros((g_count, m, h))
    y[g, r] = base[nodes]

    # W (G, m, m)
    if method == "mint_shrink" or (method == "bottom_up" and res is not None):
        rz = np.zeros((g_count, m, res.shape[1]))
        rz[g, r] = res[nodes]
        w, lam = shrunk_covariance(rz)
        idx = np.arange(m)
        w[:, idx, idx] += MINT_RIDGE
        if shrinkage is not None:
            shrinkage[cs] = lam
    elif method == "bottom_up":
        w = np.broadcast_to(np.eye(m), (g_count, m, m)).copy()
    else:
        w = np.zeros((g_count, m, m))
        w[g, r, r] = wdiag[nodes]

    if method == "bottom_up":
        # M = S P_bu: each node takes the sum of its leaves' base forecasts
        proj = np.zeros((g_count, m, m))
        leaf_nodes = nodes >= tree.n_aggregates
        leaves = nodes[leaf_nodes] - tree.n_aggregates
        gl, rl = g[leaf_nodes], r[leaf_nodes]
        for anc in tree.leaf_ancestors:  # a loop over levels
            proj[gl, rank[anc[leaves]], rl] = 1.0
        out = proj @ y
    else:
        c = np.zeros((g_count, max(a, 1), m))
        is_agg = nodes < tree.n_aggregates
        c[g[is_agg], r[is_agg], r[is_agg]] = 1.0
        has_parent = tree.parent[nodes] >= 0
        c[g[has_parent], rank[tree.parent[nodes[has_parent]]], r[has_parent]] = -1.0
        cw = c @ w
        k = cw @ c.transpose(0, 2, 1)
        pad = np.arange(c.shape[1])[None, :] >= n_agg[cs][:, None]  # padding constraints: identity rows
        k[:, np.arange(c.shape[1]), np.arange(c.shape[1])] += pad
        out = y - cw.transpose(0, 2, 1) @ np.linalg.solve(k, c @ y)
        proj = None
        if sigma is not None:
            proj = np.eye(m)[None] - cw.transpose(0, 2, 1) @ np.linalg.solve(k, c)
    values[nodes] = out[g, r]

    if sigma is not None:
        sig = np.zeros((g_count, m, h))
        sig[g, r] = np.asarray(sigma, dtype=float)[nodes]
        std = np.sqrt(np.diagonal(w, axis1=1, axis2=2))
        corr = np.divide(
            w, std[:, :, None] * std[:, None, :], out=np.zeros_like(w), where=(std[:, :, None] * std[:, None, :]) > 0
        )
        for step in range(h):  # a loop over horizon periods
            scaled = proj * sig[:, None, :, step]  # S P D_h
            var = ((scaled @ corr) * scaled).sum(axis=2)  # diag(A R A'), by BLAS products
            sd[nodes, step] = np.sqrt(np.clip(var, 0.0, None))[g, r]
