"""MinT / WLS over a tree with levels above the parent, and its coherent normal intervals.

Outside reference: hierarchicalforecast 1.5.3, `hierarchicalforecast.methods.MinTrace`
(`ols`, `wls_struct`, `wls_var`, `mint_shrink`; Wickramasuriya, Athanasopoulos & Hyndman 2019)
and `BottomUp`, each with `intervals_method="normality"` (the reconciled covariance
S P (D_h R D_h) P' S', Panagiotelis et al. 2023), and `hierarchicalforecast.probabilistic_methods.
Normality` directly for bottom-up with correlated leaves. The tree is total > region > parent >
leaf, as issue 13 asks, built from integer parent codes; the seeded data are arbitrary and the
reference library is the judge, to 1e-7 relative (means) and 1e-7 relative (interval bounds).
"""

from __future__ import annotations

import numpy as np
import pytest
from hierarchicalforecast.methods import BottomUp, MinTrace
from hierarchicalforecast.probabilistic_methods import Normality

from pipelines.engines.hierarchy import mint_reconcile, shrunk_covariance
from pipelines.engines.tree_reconciliation import reconcile_tree, tree_from_parent_codes

# 14 leaves -> 6 parents -> 2 regions -> 1 total
PARENT_OF_LEAF = np.array([0, 0, 0, 1, 1, 2, 2, 2, 2, 3, 3, 4, 5, 5])
REGION_OF_PARENT = np.array([0, 0, 0, 1, 1, 1])
TOTAL_OF_REGION = np.array([0, 0])


def _tree():
    return tree_from_parent_codes([PARENT_OF_LEAF, REGION_OF_PARENT, TOTAL_OF_REGION])


def _data(tree, seed, periods=80, h=4):
    """Incoherent base forecasts, in-sample values and fitted values with correlated errors."""
    rng = np.random.default_rng(seed)
    s = tree.summing_matrix().toarray()
    common = rng.normal(0, 3, periods)
    leaf_y = 20 + rng.normal(0, 2, (tree.n_leaves, periods)) + common * rng.uniform(0.2, 1.0, (tree.n_leaves, 1))
    y_in = s @ leaf_y
    fitted = y_in + rng.normal(0, 1.5, y_in.shape) * np.sqrt(s.sum(axis=1, keepdims=True)) + common * 0.4
    base = s @ (20 + rng.normal(0, 2, (tree.n_leaves, h))) + rng.normal(4, 3, (tree.n_nodes, h))
    sigma = rng.uniform(1, 4, (tree.n_nodes, h)) * np.sqrt(s.sum(axis=1, keepdims=True))
    return s, base, y_in, fitted, sigma


def test_tree_from_codes_numbers_nodes_top_first_and_builds_s():
    tree = _tree()
    assert tree.level_sizes == (1, 2, 6, 14) and tree.n_nodes == 23 and tree.n_aggregates == 9
    s = tree.summing_matrix().toarray()
    assert s[0].sum() == 14  # the total holds every leaf
    assert s[1].tolist()[:9] == [1.0] * 9 and s[1, 9:].sum() == 0  # region 0 = parents 0-2 = leaves 0-8
    np.testing.assert_array_equal(s[9:], np.eye(14))
    assert tree.parent[3] == 1 and tree.parent[9] == 3 and (tree.root == 0).all()
    # the constraint matrix is zero on coherent values and names the gap of a broken one
    values = tree.sums(np.arange(14.0))
    assert np.abs(tree.coherence_gaps(values)).max() == 0
    values[4] += 1.0  # parent 1 off by one: its own row and its region's row show it
    gaps = tree.coherence_gaps(values)
    assert gaps[4] == 1.0 and gaps[1] == -1.0 and np.count_nonzero(gaps) == 2


def test_codes_with_a_childless_node_or_out_of_range_are_refused():
    with pytest.raises(ValueError, match="no children"):
        tree_from_parent_codes([np.array([0, 0, 2])])
    with pytest.raises(ValueError, match="must lie in 0..1"):
        tree_from_parent_codes([np.array([0, 1]), np.array([0, 2])], n_top=2)


@pytest.mark.parametrize("method", ["ols", "wls_struct", "wls_var", "mint_shrink"])
@pytest.mark.parametrize("seed", [1, 2])
def test_reconciled_means_and_intervals_equal_hierarchicalforecast_mintrace(method, seed):
    tree = _tree()
    s, base, y_in, fitted, sigma = _data(tree, seed)
    ref = MinTrace(method=method).fit_predict(
        S=s,
        y_hat=base,
        y_insample=y_in,
        y_hat_insample=fitted,
        sigmah=sigma,
        level=[80, 95],
        intervals_method="normality",
    )
    ours = reconcile_tree(tree, base, method, residuals=y_in - fitted, sigma=sigma)
    np.testing.assert_allclose(ours.values, ref["mean"], rtol=1e-7)
    np.testing.assert_allclose(ours.sd, ref["sigmah"], rtol=1e-7)
    # the library returns the bounds as quantiles 0.025, 0.1, 0.9, 0.975 (levels 95 and 80)
    z80, z95 = 1.2815515655446004, 1.959963984540054  # standard normal quantiles 0.90 and 0.975
    np.testing.assert_allclose(ours.values - z80 * ours.sd, ref["quantiles"][:, :, 1], rtol=1e-7)
    np.testing.assert_allclose(ours.values + z95 * ours.sd, ref["quantiles"][:, :, 3], rtol=1e-7)
    # the point path without intervals (sparse for diagonal W) gives the same means
    np.testing.assert_allclose(
        reconcile_tree(tree, base, method, residuals=y_in - fitted).values, ref["mean"], rtol=1e-7
    )
    assert np.abs(tree.coherence_gaps(ours.values)).max() < 1e-9


def test_bottom_up_intervals_equal_hierarchicalforecast_independent_and_correlated():
    tree = _tree()
    s, base, y_in, fitted, sigma = _data(tree, 3)
    ref = BottomUp().fit_predict(S=s, y_hat=base, sigmah=sigma, level=[90], intervals_method="normality")
    ours = reconcile_tree(tree, base, "bottom_up", sigma=sigma)
    np.testing.assert_allclose(ours.values, ref["mean"], rtol=1e-12)
    np.testing.assert_allclose(ours.sd, ref["sigmah"], rtol=1e-7)
    np.testing.assert_allclose(ours.values + 1.6448536269514722 * ours.sd, ref["quantiles"][:, :, 1], rtol=1e-7)
    # correlated leaves: Normality with P = [0 | I] and the shrunk residual covariance as W
    p = np.hstack([np.zeros((14, 9)), np.eye(14)])
    w, _ = shrunk_covariance((y_in - fitted)[None])
    w = w[0] + 2e-8 * np.eye(23)
    normal = Normality(S=s, P=p, y_hat=base, sigmah=sigma, W=w)
    shrunk = reconcile_tree(tree, base, "bottom_up", residuals=y_in - fitted, sigma=sigma, leaf_correlation="shrunk")
    np.testing.assert_allclose(shrunk.sd, normal.sigmah_rec, rtol=1e-7)
    assert (shrunk.sd[0] > ours.sd[0]).all()  # positively correlated leaves widen the total's interval


def test_a_forest_of_trees_reconciles_each_tree_as_the_reference_does_alone():
    # two products (top-level nodes), each product > sites > customers, different shapes
    leaf_site = np.array([0, 0, 1, 1, 1, 2, 3, 3, 4, 4, 4, 4])
    site_product = np.array([0, 0, 1, 1, 1])
    tree = tree_from_parent_codes([leaf_site, site_product])
    assert tree.level_sizes == (2, 5, 12)
    s, base, y_in, fitted, sigma = _data(tree, 4)
    for method in ("mint_shrink", "wls_var"):
        ours = reconcile_tree(tree, base, method, residuals=y_in - fitted, sigma=sigma)
        for top in range(2):
            rows = np.flatnonzero(tree.root == top)
            cols = np.flatnonzero(s[rows].any(axis=0))
            ref = MinTrace(method=method).fit_predict(
                S=s[np.ix_(rows, cols)],
                y_hat=base[rows],
                y_insample=y_in[rows],
                y_hat_insample=fitted[rows],
                sigmah=sigma[rows],
                level=[80],
                intervals_method="normality",
            )
            np.testing.assert_allclose(ours.values[rows], ref["mean"], rtol=1e-7)
            np.testing.assert_allclose(ours.sd[rows], ref["sigmah"], rtol=1e-7)
    # with a diagonal W the trees do not interact: the reference over the whole forest agrees too
    ref = MinTrace(method="wls_var").fit_predict(S=s, y_hat=base, y_insample=y_in, y_hat_insample=fitted)
    np.testing.assert_allclose(
        reconcile_tree(tree, base, "wls_var", residuals=y_in - fitted).values, ref["mean"], rtol=1e-7
    )


def test_two_level_families_agree_with_the_cycles_own_mint():
    # parents as top-level nodes: the tree engine must reproduce pipelines.engines.hierarchy.mint_reconcile
    parent_of_child = np.array([0, 1, 0, 2, 1, 2, 0, 2])
    tree = tree_from_parent_codes([parent_of_child])
    rng = np.random.default_rng(9)
    leaf_fc, parent_fc = rng.uniform(5, 20, (8, 3)), rng.uniform(20, 60, (3, 3))
    leaf_res, parent_res = rng.normal(0, 2, (8, 40)), rng.normal(0, 5, (3, 40))
    p, leaf = mint_reconcile(parent_fc, leaf_fc, parent_of_child, "mint_shrink", parent_res, leaf_res)
    ours = reconcile_tree(
        tree, np.vstack([parent_fc, leaf_fc]), "mint_shrink", residuals=np.vstack([parent_res, leaf_res])
    )
    np.testing.assert_allclose(ours.values[:3], p, rtol=1e-9)
    np.testing.assert_allclose(ours.values[3:], leaf, rtol=1e-9)


def test_dense_method_refuses_a_tree_over_the_limit():
    tree = _tree()
    s, base, y_in, fitted, _ = _data(tree, 5)
    with pytest.raises(ValueError, match="max_dense_nodes=10"):
        reconcile_tree(tree, base, "mint_shrink", residuals=y_in - fitted, max_dense_nodes=10)
    with pytest.raises(ValueError, match="choose from"):
        reconcile_tree(tree, base, "mint_cov")
    with pytest.raises(ValueError, match="needs residuals"):
        reconcile_tree(tree, base, "wls_var")
