"""Aggregation levels above the parent: their tree, base forecasts, reconciliation with MinT, and coherence.

`hierarchy.upper_levels` names levels above the parent (product x site),
bottom to top: `product` (the product across its sites), a column of the
products master data (e.g. `product_family`), `total` (the whole class). With
the parents and leaves below them they form one tree per top node
(`tree_reconciliation.tree_from_parent_codes`); a node never spans classes.

- **Base forecasts**: each upper node's series is the sum of its parents'
  history; it is forecast with its class's models (seasonal as the class's
  `models.seasonal`), with in-sample one-step fitted values and, with
  intervals, standard deviations (`models.run_model_groups`).
- **MinT and WLS** (`mint_shrink`, `wls_var`): the whole tree - upper levels,
  parents, leaves - is reconciled at once (`reconcile_tree`, dense per top
  node, the residual covariance over all its nodes: Wickramasuriya,
  Athanasopoulos & Hyndman 2019), so the parents gain from the upper levels'
  forecasts. The reconciled parents and leaves then go through the class's
  per-parent strategy as base forecasts: a coherent input is left as it is by
  that projection, and only the lifecycle (inactive children) and
  non-negativity move them (`pipelines.engines.hierarchy`).
- **Every strategy**: an upper node's stored forecast is the sum of its
  parents' forecasts (bottom-up and the split strategies gain nothing from
  the levels, but their forecasts are kept beside each node's own base
  forecast). `find_incoherent_upper_levels` proves each node equals the sum of
  its children (the blocking check `upper_levels_coherent`).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

from pipelines.checks import RELATIVE_TOLERANCE, UPPER_LEVELS_COHERENT
from pipelines.engines.base_forecasts import _subgrid, residual_matrix
from pipelines.engines.models import ModelSettings, assign_models, demand_classes, run_model_groups
from pipelines.engines.series_grids import SeriesGrid, series_grid
from pipelines.engines.tree_reconciliation import Tree, reconcile_tree, tree_from_parent_codes
from pipelines.errors import ConfigError
from pipelines.vocabulary import GROUP_PRODUCT, LEVEL_TOTAL

FAILING_COLUMNS = ["product_class", "level", "node", "period_start", "column", "value", "children_sum"]
UPPER_COLUMNS = [
    "cycle_date", "product_class", "level", "node", "parent_node", "period_start", "base_forecast",
    "strategy_forecast", "forecast", "model",
]


def level_labels(parents: pd.DataFrame, products: pd.DataFrame | None, level: str, where: str) -> np.ndarray:
    """(n_parents,) the label of each parent's node on `level` (product, a products column, or total)."""
    if level == GROUP_PRODUCT:
        return parents["product"].astype(str).to_numpy()
    if level == LEVEL_TOTAL:
        return parents["product_class"].astype(str).to_numpy()
    if products is None or level not in products.columns:
        have = [] if products is None else sorted(products.columns)
        raise ConfigError(
            f"{where}: level {level!r} is neither 'product', 'total' nor a column of the products master data "
            f"(columns: {have}); add the column to the products file or remove the level"
        )
    column = products.drop_duplicates("product").set_index("product")[level]
    return parents["product"].map(column).fillna("").astype(str).to_numpy()


@dataclass(frozen=True)
class UpperTree:
    """The tree over the leaves with the upper levels on top (nodes: upper levels top first, parents, leaves).

    levels: the upper level names, top first; level, label, parent_label:
    (n_upper,) per upper node; node_of_parent: (n_parents,) node id of each
    parent's lowest upper node; n_upper: upper nodes (ids 0..n_upper-1).
    """

    tree: Tree
    levels: tuple[str, ...]
    level: np.ndarray
    label: np.ndarray
    parent_label: np.ndarray
    product_class: np.ndarray
    node_of_parent: np.ndarray
    n_upper: int


def upper_tree(
    parents: pd.DataFrame, products: pd.DataFrame | None, levels: Sequence[str], parent_of_child: np.ndarray,
    where: str = "hierarchy.upper_levels",
) -> UpperTree:
    """The tree of `levels` (bottom to top) above the parents (product, site, product_class) and their leaves.

    Raises a ConfigError naming the level and a node when a level does not
    nest in the next (a node below would have two parents).
    """
    cls = parents["product_class"].astype(str).to_numpy()
    codes = [np.asarray(parent_of_child, dtype=np.int64)]
    member_code = np.arange(len(parents))  # each parent's node on the level below
    sizes, labels = [], []
    below_name = "parent"
    for level in levels:
        lab = level_labels(parents, products, level, where)
        code, uniques = pd.factorize(pd.Series(cls).str.cat(lab, sep="\x1f"))
        # the node of each node of the level below: all its parents must agree
        rep = pd.DataFrame({"below": member_code, "up": code}).drop_duplicates()
        split = rep[rep["below"].duplicated(keep=False)]
        if len(split):
            first = int(np.flatnonzero(member_code == split["below"].iloc[0])[0])
            raise ConfigError(
                f"{where}: level {level!r} does not nest in the level below ({below_name}): the parents below one "
                f"{below_name} node (e.g. product {parents['product'].iloc[first]!r}) have different {level!r} "
                f"values; correct the products master data or the order of the levels"
            )
        codes.append(rep.sort_values("below")["up"].to_numpy(np.int64))
        sizes.append(len(uniques))
        labels.append((level, np.asarray([u.split("\x1f", 1) for u in uniques], dtype=object).reshape(-1, 2)))
        member_code = code
        below_name = level
    tree = tree_from_parent_codes(codes, n_top=sizes[-1] if sizes else None)
    # upper node ids, top level first: labels in the tree's order
    level_col, label_col, class_col, parent_col = [], [], [], []
    for k in range(len(levels) - 1, -1, -1):
        name, lab = labels[k]
        level_col += [name] * len(lab)
        class_col += list(lab[:, 0])
        label_col += list(lab[:, 1])
    n_upper = len(level_col)
    parent = tree.parent[:n_upper]
    label_arr = np.asarray(label_col, dtype=object)
    parent_col = np.where(parent >= 0, label_arr[np.maximum(parent, 0)], "")
    n_levels = len(tree.level_sizes)
    lowest = tree.leaf_ancestors[n_levels - 3] if levels else np.zeros(0, np.int64)  # per leaf
    node_of_parent = np.full(len(parents), -1, dtype=np.int64)
    node_of_parent[np.asarray(parent_of_child)] = lowest
    return UpperTree(
        tree, tuple(reversed(tuple(levels))), np.asarray(level_col, dtype=object), label_arr,
        np.asarray(parent_col, dtype=object), np.asarray(class_col, dtype=object), node_of_parent, n_upper,
    )


def upper_frame(
    ut: UpperTree, cycle_date, starts: pd.DatetimeIndex, base: np.ndarray, model: np.ndarray,
    strategy_parent: np.ndarray, final_parent: np.ndarray,
) -> pd.DataFrame:
    """The `upper_level_forecast` rows: every upper node and period, its base forecast and the sums below it."""
    h = len(starts)
    sums = {}
    for name, values in (("strategy_forecast", strategy_parent), ("forecast", final_parent)):
        node = np.zeros((ut.n_upper, h))
        np.add.at(node, ut.node_of_parent, values)
        for k in range(ut.n_upper - 1, -1, -1):  # a loop over upper nodes, deepest first (ids grow downwards)
            p = ut.tree.parent[k]
            if p >= 0:
                node[p] += node[k]
        sums[name] = node
    rows = np.repeat(np.arange(ut.n_upper), h)
    return pd.DataFrame(
        {
            "cycle_date": cycle_date,
            "product_class": ut.product_class[rows],
            "level": ut.level[rows],
            "node": ut.label[rows],
            "parent_node": ut.parent_label[rows],
            "period_start": np.tile(starts.values, ut.n_upper),
            "base_forecast": base.ravel(),
            "strategy_forecast": sums["strategy_forecast"].ravel(),
            "forecast": sums["forecast"].ravel(),
            "model": model[rows],
        }
    )[UPPER_COLUMNS]


def find_incoherent_upper_levels(
    upper: pd.DataFrame, parent_forecast: pd.DataFrame, products: pd.DataFrame, levels: Sequence[str]
) -> pd.DataFrame:
    """Rows (level, node, period_start) whose forecast or strategy_forecast is not the sum of its children's.

    The children of the lowest level's nodes are the parents of
    `parent_forecast` with that label (`level_labels`); a higher node's are the
    nodes of the level below naming it as parent_node. A node missing on
    either side counts as 0 there. Tolerance: |difference| <= 1e-9 x max(|node|, 1).
    """
    if not len(levels):
        return pd.DataFrame(columns=FAILING_COLUMNS)
    out = []
    below = parent_forecast.assign(
        key=level_labels(parent_forecast, products, levels[0], "hierarchy.upper_levels")
    )
    for k, level in enumerate(levels):
        mine = upper[upper["level"] == level]
        if k > 0:
            below = upper[upper["level"] == levels[k - 1]].assign(key=lambda d: d["parent_node"])
        keys = ["product_class", "key", "period_start"]
        sums = below.groupby(keys)[["forecast", "strategy_forecast"]].sum().reset_index()
        both = mine.rename(columns={"node": "key"}).merge(sums, on=keys, how="outer", suffixes=("", "_children"))
        both["level"] = level
        for column in ("forecast", "strategy_forecast"):
            node = both[column].fillna(0.0).to_numpy(float)
            child = both[f"{column}_children"].fillna(0.0).to_numpy(float)
            bad = np.abs(node - child) > RELATIVE_TOLERANCE * np.maximum(np.abs(node), 1.0)
            if bad.any():
                rows = both[bad]
                out.append(pd.DataFrame({
                    "product_class": rows["product_class"], "level": level, "node": rows["key"],
                    "period_start": rows["period_start"], "column": column, "value": node[bad],
                    "children_sum": child[bad],
                }))
    if not out:
        return pd.DataFrame(columns=FAILING_COLUMNS)
    return pd.concat(out, ignore_index=True)


@dataclass(frozen=True)
class UpperBase:
    """Base forecasts of the upper nodes: fc, sd (n_upper, h; sd None without intervals), residuals over the
    window of the parents' and leaves' (None where no class needs them), model label per node."""

    fc: np.ndarray
    sd: np.ndarray | None
    residuals: np.ndarray | None
    label: np.ndarray


def upper_base(
    ut: UpperTree, p_grid: SeriesGrid, models: ModelSettings, horizon: int, window: tuple[int, int] | None,
    sd: bool, log=None,
) -> UpperBase:
    """Each upper node's series (the sum of its parents' history, every level) forecast with its class's models."""
    # every parent row counts once on each upper level: its lowest node and that node's ancestors
    code = [ut.node_of_parent[p_grid.series]]
    while True:
        up = ut.tree.parent[code[-1]]
        if (up < 0).all():
            break
        code.append(up)
    code = np.concatenate(code)
    ords = np.tile(p_grid.ordinal, len(code) // max(len(p_grid.ordinal), 1))
    y = np.tile(p_grid.y, len(code) // max(len(p_grid.y), 1))
    end = int(p_grid.ordinal.max()) + 1 if len(p_grid.ordinal) else 0
    grid = series_grid(code, ords, y, ut.n_upper, end)
    demand, _, _ = demand_classes(grid)
    length = np.bincount(grid.series, minlength=grid.n_series)
    fc = np.zeros((ut.n_upper, horizon))
    sds = np.zeros((ut.n_upper, horizon))
    fitted = np.full(len(grid.y), np.nan)
    label = np.full(ut.n_upper, "", dtype=object)
    for name in pd.unique(ut.product_class):  # a loop over classes
        members = ut.product_class == name
        choice = models.choices[name]
        names, season = assign_models(demand[members], length[members], choice, models.period)
        res = run_model_groups(
            _subgrid(grid, members), names, season, horizon, log=log, tsb=choice.tsb, fitted=True,
            engine=models.engine, sd=sd,
        )
        fc[members], label[members] = res.forecast, res.label
        fitted[members[grid.series]] = res.fitted
        if sd:
            sds[members] = res.sd
    residuals = None if window is None else residual_matrix(grid, fitted, window[0], window[1])
    return UpperBase(np.clip(fc, 0, None), sds if sd else None, residuals, label)


def reconcile_upper(
    ut: UpperTree, upper: UpperBase, base, method: str, sd: bool
) -> tuple[np.ndarray, np.ndarray, tuple[np.ndarray, np.ndarray] | None]:
    """(parent (n_parents, h), leaf (n_children, h), (parent sd, leaf sd) or None): MinT / WLS over the tree."""
    n_p = base.parent_fc.shape[0]
    y = np.vstack([upper.fc, base.parent_fc, base.leaf_fc])
    res = None
    if upper.residuals is not None and base.parent_res is not None:
        res = np.vstack([upper.residuals, base.parent_res, base.leaf_res])
    sigma = np.vstack([upper.sd, base.parent_sd, base.leaf_sd]) if sd else None
    out = reconcile_tree(ut.tree, y, method, residuals=res, sigma=sigma, dense=True)
    k = ut.n_upper
    tree_sd = None if out.sd is None else (out.sd[k : k + n_p], out.sd[k + n_p :])
    return out.values[k : k + n_p], out.values[k + n_p :], tree_sd


def residual_window(p_grid: SeriesGrid, c_grid: SeriesGrid) -> tuple[int, int]:
    """The periods of the residual matrices `base_forecasts` builds (first history period to the origin)."""
    both = np.concatenate([p_grid.ordinal, c_grid.ordinal])
    return (int(both.min()), int(both.max()) + 1) if len(both) else (0, 0)


def apply_upper_levels(ut: UpperTree, upper: UpperBase, base, strategy_of_parent: np.ndarray, parent_of_child, sd):
    """`base` with the parents and leaves of MinT / WLS classes replaced by the reconciliation over the whole tree,
    and the reconciled (parent sd, leaf sd) of those parents (NaN elsewhere; None without intervals)."""
    p_fc, l_fc = base.parent_fc.copy(), base.leaf_fc.copy()
    p_sd = np.full(p_fc.shape, np.nan)
    l_sd = np.full(l_fc.shape, np.nan)
    for method in pd.unique(strategy_of_parent):  # a handful of strategies
        if method not in ("mint_shrink", "wls_var"):
            continue
        ps = strategy_of_parent == method
        cs = ps[parent_of_child]
        p, leaf, tree_sd = reconcile_upper(ut, upper, base, method, sd)
        p_fc[ps], l_fc[cs] = p[ps], leaf[cs]
        if tree_sd is not None:
            p_sd[ps], l_sd[cs] = tree_sd[0][ps], tree_sd[1][cs]
    return replace(base, parent_fc=p_fc, leaf_fc=l_fc), ((p_sd, l_sd) if sd else None)


@dataclass(frozen=True)
class UpperRun:
    """The upper levels of one forecast run: the tree and its nodes' base forecasts (None without levels)."""

    tree: UpperTree | None = None
    base: UpperBase | None = None

    def frame(self, cycle_date, starts, strategy_parent: np.ndarray, final_parent: np.ndarray) -> pd.DataFrame:
        """`upper_level_forecast` (empty, with its columns, without levels)."""
        if self.tree is None:
            return pd.DataFrame({c: [] for c in UPPER_COLUMNS})
        return upper_frame(self.tree, cycle_date, starts, self.base.fc, self.base.label, strategy_parent, final_parent)


def upper_levels_run(
    levels, parents, products, parent_of_child, p_grid, c_grid, base, strategy_of_parent, models, horizon, sd,
    where="hierarchy.upper_levels", log=None,
):
    """(base with MinT / WLS parents and leaves reconciled over the tree, their sd or None, UpperRun)."""
    if not levels:
        return base, None, UpperRun()
    tree = upper_tree(parents, products, levels, parent_of_child, where)
    window = residual_window(p_grid, c_grid) if base.parent_res is not None else None
    upper = upper_base(tree, p_grid, models, horizon, window, sd, log)
    base, tree_sd = apply_upper_levels(tree, upper, base, strategy_of_parent, parent_of_child, sd)
    return base, tree_sd, UpperRun(tree, upper)


def upper_level_checks(
    upper: pd.DataFrame, parent_forecast: pd.DataFrame, products: pd.DataFrame, upper_levels: Sequence[str]
) -> dict:
    """The check `upper_levels_coherent` over the stored tables (`find_incoherent_upper_levels`)."""
    from pipelines.results import CheckRows

    failing = find_incoherent_upper_levels(upper, parent_forecast, products, tuple(upper_levels))
    return {UPPER_LEVELS_COHERENT: CheckRows(failing)}
