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
from hierarchicalforecast.methods import MinTrace, TopDown

from pipelines.engines.hierarchy import mint_reconcile, nonnegative_keeping_parent, shrunk_covariance


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


def test_negative_leaves_go_to_zero_and_the_others_keep_the_parent_in_proportion():
    # parent 0, one period: reconciled parent 10, leaves 6, 6, -2 -> -2 set to 0, 6 and 6 scaled by 10 / 12:
    # 5, 5, 0 (the 2 held below 0 is taken from the others in proportion); parent 1 has no negative leaf:
    # its leaves 3, 4 stay as they are even though they sum to 7, not 8 (only touched periods move)
    parent = np.array([[10.0], [8.0]])
    leaf = np.array([[6.0], [6.0], [-2.0], [3.0], [4.0]])
    out, moved, negatives = nonnegative_keeping_parent(parent, leaf, np.array([0, 0, 0, 1, 1]))
    np.testing.assert_allclose(out.ravel(), [5.0, 5.0, 0.0, 3.0, 4.0], rtol=1e-15)
    assert moved.ravel().tolist() == [2.0, 0.0] and negatives == 1


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_the_nonnegative_split_is_hierarchicalforecasts_forecast_proportions_on_the_reconciled_values(seed):
    # Reference: hierarchicalforecast 1.5.3 TopDown(method="forecast_proportions") (Athanasopoulos, Ahmed &
    # Hyndman 2009) on the two-level tree [parent; children], fed the reconciled parent and the children's
    # reconciled values clipped at 0: children = parent x clipped / sum of clipped, period by period
    rng = np.random.default_rng(seed)
    n, h = 5, 4
    leaf = rng.uniform(-3, 12, (n, h))
    leaf[0] = -1.0  # a negative leaf in every period
    parent = leaf.sum(axis=0)  # the reconciled pair is coherent before the clip
    out, moved, _ = nonnegative_keeping_parent(parent[None, :], leaf, np.zeros(n, dtype=np.int64))
    S = np.vstack([np.ones((1, n)), np.eye(n)])
    tags = {"parent": np.array([0]), "parent/child": np.arange(1, n + 1)}  # each level: its rows of S
    ref = TopDown(method="forecast_proportions").fit_predict(
        S=S, y_hat=np.vstack([parent[None, :], np.clip(leaf, 0, None)]), tags=tags
    )["mean"]
    np.testing.assert_allclose(out, ref[1:], rtol=1e-12)
    np.testing.assert_allclose(out.sum(axis=0), parent, rtol=1e-12)  # the parent keeps its volume
    np.testing.assert_allclose(moved[0], np.where(leaf < 0, -leaf, 0).sum(axis=0), rtol=1e-15)
    assert (out >= 0).all()


def test_where_no_reconciled_leaf_is_above_zero_the_fallback_basis_splits_the_parent():
    # reconciled parent 6 over leaves -1, 0: nothing positive to scale; the shares 1 : 2 give 2 and 4
    out, moved, negatives = nonnegative_keeping_parent(
        np.array([[6.0]]), np.array([[-1.0], [0.0]]), np.array([0, 0]), fallback=np.array([[1.0], [2.0]])
    )
    np.testing.assert_allclose(out.ravel(), [2.0, 4.0], rtol=1e-15)
    assert moved.ravel().tolist() == [1.0] and negatives == 1
    # a negative reconciled parent cannot be carried by leaves >= 0: they stay 0 and the checks report it
    out, _, _ = nonnegative_keeping_parent(np.array([[-3.0]]), np.array([[-1.0], [-2.0]]), np.array([0, 0]))
    assert out.ravel().tolist() == [0.0, 0.0]


def test_mint_on_the_active_children_equals_mintrace_on_each_periods_sub_hierarchy():
    # Reference: hierarchicalforecast 1.5.3 MinTrace(method="wls_var") on the tree of the parent and the
    # children active in the period (a child outside its span is not in the hierarchy then). With a
    # diagonal W, dropping the inactive children's rows and columns is exactly the sub-hierarchy's W.
    n, h = 4, 3
    parent_fc, leaf_fc, parent_y, parent_fit, leaf_y, leaf_fit = family(n, 60, h, 21)
    active = np.ones((n, h), dtype=bool)
    active[3, 1:] = False  # child 3 ends after the first period
    active[0, 2] = False  # child 0 is out in the last one
    parent, leaf = mint_reconcile(
        parent_fc[None, :], leaf_fc, np.zeros(n, dtype=np.int64), "wls_var",
        (parent_y - parent_fit)[None, :], leaf_y - leaf_fit, active=active,
    )
    for t in range(h):
        kids = np.flatnonzero(active[:, t])
        expected = reference(
            "wls_var", parent_fc[[t]], leaf_fc[kids][:, [t]], parent_y, parent_fit, leaf_y[kids], leaf_fit[kids]
        )
        np.testing.assert_allclose(parent[0, t], expected[0, 0], rtol=1e-7)
        np.testing.assert_allclose(leaf[kids, t], expected[1:, 0], rtol=1e-7)
        assert (leaf[~active[:, t], t] == 0).all()
    # every child active: the same as without the mask, to the last bit
    full = mint_reconcile(parent_fc[None, :], leaf_fc, np.zeros(n, dtype=np.int64), "mint_shrink",
                          (parent_y - parent_fit)[None, :], leaf_y - leaf_fit)
    same = mint_reconcile(parent_fc[None, :], leaf_fc, np.zeros(n, dtype=np.int64), "mint_shrink",
                          (parent_y - parent_fit)[None, :], leaf_y - leaf_fit, active=np.ones((n, h), dtype=bool))
    assert np.array_equal(full[0], same[0]) and np.array_equal(full[1], same[1])


def test_masked_mint_shrink_is_the_gls_formula_on_the_sub_hierarchys_w():
    # mint_shrink estimates W once on the whole family (every child's residuals); in a period with an
    # inactive child the projection must equal the S-form y~ = S (S'W^-1 S)^-1 S'W^-1 y^ of the
    # sub-hierarchy with W's inactive rows and columns dropped (Wickramasuriya et al. 2019, eq. for MinT)
    from pipelines.engines.hierarchy import MINT_RIDGE

    n = 3
    parent_fc, leaf_fc, parent_y, parent_fit, leaf_y, leaf_fit = family(n, 50, 2, 8)
    res = np.vstack([(parent_y - parent_fit)[None, :], leaf_y - leaf_fit])
    active = np.array([[True, True], [True, False], [True, True]])
    parent, leaf = mint_reconcile(
        parent_fc[None, :], leaf_fc, np.zeros(n, dtype=np.int64), "mint_shrink", res[:1], res[1:], active=active
    )
    w = shrunk_covariance(res[None])[0][0] + MINT_RIDGE * np.eye(n + 1)
    keep = [0, 1, 3]  # the parent and children 0 and 2 in period 1
    ws = w[np.ix_(keep, keep)]
    S = np.vstack([np.ones((1, 2)), np.eye(2)])
    wi = np.linalg.inv(ws)
    y = np.r_[parent_fc[1], leaf_fc[[0, 2], 1]]
    expected = S @ np.linalg.solve(S.T @ wi @ S, S.T @ wi @ y)
    np.testing.assert_allclose([parent[0, 1], leaf[0, 1], leaf[2, 1]], expected, rtol=1e-9)
    assert leaf[1, 1] == 0.0
