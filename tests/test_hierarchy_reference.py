"""Our per-parent MinT against hierarchicalforecast's `MinTrace` (outside reference).

Reference: hierarchicalforecast 1.5.3, `hierarchicalforecast.methods.MinTrace`
with method `mint_shrink` (Wickramasuriya, Athanasopoulos & Hyndman 2019,
shrinkage estimator of Schaefer & Strimmer 2005), `wls_var` (the WLS estimator
of the same paper: W = diag of the residual variances) and `wls_struct`.
Each check builds one two-level hierarchy (a parent and its children, summing
matrix S = [1'; I]) exactly as our cycle sees it; the seeded residuals and base
forecasts are arbitrary, the reference library is the judge.
"""

from __future__ import annotations

import numpy as np
import pytest
from hierarchicalforecast.methods import MinTrace

from pipelines.engines.hierarchy import clip_and_resum, mint_reconcile, shrunk_covariance


def family(n_children, periods, horizon, seed):
    """Base forecasts and in-sample data of one parent with `n_children` children."""
    rng = np.random.default_rng(seed)
    common = rng.normal(0, 3, periods)
    leaf_y = 20 + rng.normal(0, 2, (n_children, periods)) + common * rng.uniform(0.2, 1.0, (n_children, 1))
    leaf_fit = leaf_y + rng.normal(0, 1.5, (n_children, periods)) + common * 0.5
    parent_y = leaf_y.sum(axis=0)
    parent_fit = parent_y + rng.normal(0, 4, periods)
    leaf_fc = 20 + rng.normal(0, 2, (n_children, horizon))
    parent_fc = leaf_fc.sum(axis=0) + rng.normal(5, 2, horizon)  # incoherent on purpose
    return parent_fc, leaf_fc, parent_y, parent_fit, leaf_y, leaf_fit


def reference(method, parent_fc, leaf_fc, parent_y, parent_fit, leaf_y, leaf_fit):
    n = leaf_fc.shape[0]
    S = np.vstack([np.ones((1, n)), np.eye(n)])
    y_hat = np.vstack([parent_fc[None, :], leaf_fc])
    y_in = np.vstack([parent_y[None, :], leaf_y])
    y_hat_in = np.vstack([parent_fit[None, :], leaf_fit])
    out = MinTrace(method=method).fit_predict(
        S=S, y_hat=y_hat, y_insample=y_in, y_hat_insample=y_hat_in
    )
    return out["mean"]


@pytest.mark.parametrize("method", ["mint_shrink", "wls_var", "wls_struct"])
@pytest.mark.parametrize("n_children,seed", [(2, 1), (3, 2), (5, 3)])
def test_mint_equals_hierarchicalforecast_mintrace(method, n_children, seed):
    parent_fc, leaf_fc, parent_y, parent_fit, leaf_y, leaf_fit = family(n_children, 60, 4, seed)
    expected = reference(method, parent_fc, leaf_fc, parent_y, parent_fit, leaf_y, leaf_fit)
    parent, leaf = mint_reconcile(
        parent_fc[None, :],
        leaf_fc,
        np.zeros(n_children, dtype=np.int64),
        method,
        parent_residuals=(parent_y - parent_fit)[None, :],
        leaf_residuals=leaf_y - leaf_fit,
    )
    np.testing.assert_allclose(parent[0], expected[0], rtol=1e-7)
    np.testing.assert_allclose(leaf, expected[1:], rtol=1e-7)


def test_several_parents_of_different_sizes_each_match_the_reference_on_its_own():
    # three parents with 3, 2 and 3 children, interleaved in the child list
    fams = [family(3, 50, 3, 11), family(2, 50, 3, 12), family(3, 50, 3, 13)]
    parent_of_child = np.array([0, 1, 0, 2, 1, 2, 0, 2])
    parent_fc = np.vstack([f[0] for f in fams])
    parent_res = np.vstack([f[2] - f[3] for f in fams])
    leaf_fc = np.zeros((8, 3))
    leaf_res = np.zeros((8, 50))
    for p, f in enumerate(fams):
        rows = np.flatnonzero(parent_of_child == p)
        leaf_fc[rows] = f[1]
        leaf_res[rows] = f[4] - f[5]
    parent, leaf = mint_reconcile(parent_fc, leaf_fc, parent_of_child, "mint_shrink", parent_res, leaf_res)
    for p, f in enumerate(fams):
        expected = reference("mint_shrink", *f)
        rows = np.flatnonzero(parent_of_child == p)
        np.testing.assert_allclose(parent[p], expected[0], rtol=1e-7)
        np.testing.assert_allclose(leaf[rows], expected[1:], rtol=1e-7)


def test_shrinkage_intensity_is_between_0_and_1_and_shrinks_only_off_diagonal():
    rng = np.random.default_rng(5)
    res = rng.normal(size=(1, 4, 30))
    w, lam = shrunk_covariance(res)
    cov = np.cov(res[0])
    assert 0 < lam[0] <= 1
    np.testing.assert_allclose(np.diag(w[0]), np.diag(cov))
    off = ~np.eye(4, dtype=bool)
    np.testing.assert_allclose(w[0][off], (1 - lam[0]) * cov[off])


def test_clip_sets_negative_leaves_to_zero_and_resums_parent():
    # parent 0 with leaves 5, -2 -> 5, 0 and parent 5; parent 1 with leaf 3 -> 3
    parent, leaf, negatives = clip_and_resum(
        np.array([[3.0], [3.0]]), np.array([[5.0], [-2.0], [3.0]]), np.array([0, 0, 1])
    )
    assert leaf.ravel().tolist() == [5.0, 0.0, 3.0]
    assert parent.ravel().tolist() == [5.0, 3.0]
    assert negatives == 1
