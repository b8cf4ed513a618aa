"""Group seasonal indices in the cycle: which series take one, and the base forecasts' history without it.

A class with `seasonality: group` forecasts its parents and leaves with its
non-seasonal models on the history divided by its group's multiplicative
seasonal index, and multiplies the forecasts (and the in-sample fitted values,
so residuals stay on the demand's scale) by the index again: the group
seasonal indices method (`pipelines.engines.group_seasonality`, Withycombe
1989). The groups are made of parents (`seasonal_group`): the product across
its sites, the whole class, or a column of the products master data; a leaf
takes its parent's group. The index is estimated on the sum of the group's
parents over the whole history before the forecast origin (a parent before
its first demand counts 0), by season position = period ordinal mod m (m = 52
weeks or 12 months; a 53rd ISO week falls on the next year's first position,
common practice, no source). A group with fewer than two full seasons has a
neutral index (1): its members are forecast as by `seasonality: none`.

`none`: the models run without a season; `own`: each series' seasonal model
(the class's `models`, with a season where two full seasons exist). A blank
`seasonality` is `own` where `models.seasonal` is true, else `none`.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
import pandas as pd

from pipelines.calendar import season_length
from pipelines.engines.group_seasonality import group_totals, seasonal_indices, seasonal_strength
from pipelines.engines.series_grids import SeriesGrid
from pipelines.errors import ConfigError
from pipelines.vocabulary import AUTO, GROUP_CLASS, GROUP_PRODUCT, Seasonality


def configured_seasonality(pc) -> str:
    """A class config's seasonality: as written, or for blank `own` with models.seasonal true, else `none`."""
    if pc.seasonality is not None:
        return pc.seasonality
    return Seasonality.OWN if pc.models.seasonal else Seasonality.NONE


def seasonality_candidates(pc) -> tuple[str, ...]:
    """The seasonalities the backtest compares for a class: its own setting, or for `auto` none (own where
    models.seasonal is true) and group."""
    mode = configured_seasonality(pc)
    if mode != AUTO:
        return (mode,)
    return (Seasonality.OWN if pc.models.seasonal else Seasonality.NONE, Seasonality.GROUP)


def group_of_parents(parents: pd.DataFrame, products: pd.DataFrame, group_by: str, where: str) -> np.ndarray:
    """(n_parents,) group code of each parent (product, site; product_class) by `group_by`."""
    if group_by == GROUP_PRODUCT:
        label = parents["product"].astype(str)
    elif group_by == GROUP_CLASS:
        label = parents["product_class"].astype(str)
    else:
        if group_by not in products.columns:
            raise ConfigError(
                f"{where}: {group_by!r} is neither 'product', 'product_class' nor a column of the products master "
                f"data (columns: {sorted(products.columns)}); add the column to products or choose another"
            )
        column = products.drop_duplicates("product").set_index("product")[group_by]
        label = parents["product"].map(column).fillna("").astype(str)
        label = parents["product_class"].astype(str) + "|" + label  # a group never spans classes
    return pd.factorize(label.to_numpy())[0].astype(np.int64)


@dataclass(frozen=True)
class SeasonPlan:
    """Group indices and which series take them.

    index: (n_groups, m) multiplicative index by season position (ordinal mod
    m); estimated, strength: (n_groups,) (strength: F_S of the group's sum);
    parent_group, child_group: group code per series, -1 where the series'
    class does not use group seasonality.
    """

    m: int
    index: np.ndarray
    estimated: np.ndarray
    strength: np.ndarray
    parent_group: np.ndarray
    child_group: np.ndarray

    def row_factor(self, grid: SeriesGrid, grain: str) -> np.ndarray:
        """(len(grid.y),) the index of each history row (1 for a series without group seasonality)."""
        group = (self.parent_group if grain == "parent" else self.child_group)[grid.series]
        return np.where(group >= 0, self.index[np.maximum(group, 0), grid.ordinal % self.m], 1.0)

    def horizon_factor(self, grain: str, first_ord: int, horizon: int) -> np.ndarray:
        """(n_series, horizon) the index of each series' horizon periods (1 without group seasonality)."""
        group = self.parent_group if grain == "parent" else self.child_group
        cols = (first_ord + np.arange(horizon)) % self.m
        return np.where(group[:, None] >= 0, self.index[np.maximum(group, 0)][:, cols], 1.0)


def dense_block(grid: SeriesGrid, start_ord: int, end_ord: int, before_start: float = 0.0) -> np.ndarray:
    """(n_series, end_ord - start_ord) the grid's values; `before_start` before a series' first row."""
    out = np.full((grid.n_series, end_ord - start_ord), before_start)
    ok = (grid.ordinal >= start_ord) & (grid.ordinal < end_ord)
    out[grid.series[ok], grid.ordinal[ok] - start_ord] = grid.y[ok]
    return out


def plan_season(
    p_grid: SeriesGrid,
    parent_group: np.ndarray,
    uses_group: np.ndarray,
    parent_of_child: np.ndarray,
    period: str,
    end_ord: int,
) -> SeasonPlan:
    """The group indices of the parents whose class uses group seasonality (`uses_group`, (n_parents,) bool)."""
    m = season_length(period)
    group = np.where(uses_group, parent_group, -1)
    codes, dense_group = np.unique(group[group >= 0], return_inverse=True)
    n_groups = len(codes)
    remap = np.full(int(parent_group.max(initial=-1)) + 1, -1, dtype=np.int64)
    remap[codes] = np.arange(n_groups)
    group = np.where(group >= 0, remap[np.maximum(group, 0)], -1)
    start = int(p_grid.ordinal.min()) if len(p_grid.ordinal) else end_ord
    index = np.ones((n_groups, m))
    estimated = np.zeros(n_groups, dtype=bool)
    strength = np.full(n_groups, np.nan)
    if n_groups and end_ord > start:
        block = dense_block(p_grid, start, end_ord)
        members = group >= 0
        totals = group_totals(block[members], group[members], n_groups)
        index, estimated, _ = seasonal_indices(totals, m, "multiplicative", phase=start % m)
        strength = seasonal_strength(totals, m)
    child_group = group[parent_of_child] if len(parent_of_child) else np.zeros(0, dtype=np.int64)
    return SeasonPlan(m, index, estimated, strength, group, child_group)


def series_strength(grid: SeriesGrid, period: str, end_ord: int, series: np.ndarray | None = None) -> np.ndarray:
    """(n_series,) seasonal strength F_S of each series' own history (NaN without two full seasons); with
    `series`, (len(series),) of those series only (the others' rows are never laid out)."""
    m = season_length(period)
    if series is not None:
        grid = _selected(grid, series)
    if not len(grid.ordinal):
        return np.full(grid.n_series, np.nan)
    block = dense_block(grid, int(grid.ordinal.min()), end_ord, before_start=np.nan)
    out = np.full(grid.n_series, np.nan)
    widths = np.sum(np.isfinite(block), axis=1)
    for width in np.unique(widths):  # a loop over history lengths, not series
        rows = np.flatnonzero(widths == width)
        if width >= 2 * m:
            out[rows] = seasonal_strength(block[rows][:, block.shape[1] - width :], m)
    return out


def _selected(grid: SeriesGrid, series: np.ndarray) -> SeriesGrid:
    """The grid of `series` only, renumbered 0..len(series)-1 in that order (rows of a series stay in order)."""
    if len(series) == grid.n_series and np.array_equal(series, np.arange(grid.n_series)):
        return grid  # every series in its own order (the forecast's parents): the grid as it is
    position = np.full(grid.n_series, -1, dtype=np.int64)
    position[series] = np.arange(len(series))
    rows = np.flatnonzero(position[grid.series] >= 0)
    new = position[grid.series[rows]]
    order = np.argsort(new, kind="stable")
    return SeriesGrid(new[order], grid.ordinal[rows][order], grid.y[rows][order], len(series))


def seasonality_in_effect(
    configured: Mapping[str, str], chosen: Mapping[str, str] | None, source: object = "<config>"
) -> dict[str, str]:
    """Each class's seasonality in effect: as configured, or for `auto` the backtest's choice (strategy_choice)."""
    out = {}
    for name, mode in configured.items():
        if mode == AUTO:
            if not chosen or not chosen.get(name):
                raise ConfigError(
                    f"{source}: product_classes.{name}.seasonality is 'auto' but the backtest made no choice for "
                    "it; materialize backtest_accuracy and strategy_choice first, or set seasonality to one of "
                    "none, own, group."
                )
            mode = chosen[name]
        out[name] = mode
    return out


def cycle_season_plan(
    p_grid: SeriesGrid,
    parents: pd.DataFrame,
    products: pd.DataFrame | None,
    modes: Mapping[str, str],
    groups: Mapping[str, str],
    parent_of_child: np.ndarray,
    period: str,
    end_ord: int,
    where: str = "product_classes",
) -> SeasonPlan | None:
    """The season plan of the classes whose seasonality is `group` (None if none is), each by its seasonal_group.

    parents: product, site, product_class per parent.
    """
    cls = parents["product_class"].to_numpy()
    grouped = [name for name, mode in modes.items() if mode == Seasonality.GROUP and (cls == name).any()]
    if not grouped:
        return None
    products = products if products is not None else pd.DataFrame({"product": []})
    code = np.full(len(parents), -1, dtype=np.int64)
    offset = 0
    for name in grouped:  # a loop over classes
        rows = cls == name
        mine = group_of_parents(
            parents[rows], products, groups.get(name, GROUP_PRODUCT), f"{where}.{name}.seasonal_group"
        )
        code[rows] = mine + offset
        offset += int(mine.max(initial=-1)) + 1
    uses = code >= 0
    return plan_season(p_grid, np.maximum(code, 0), uses, parent_of_child, period, end_ord)


def strength_columns(
    models: pd.DataFrame,
    p_grid: SeriesGrid,
    c_grid: SeriesGrid,
    season: SeasonPlan | None,
    modes: Mapping[str, str],
    parents: pd.DataFrame,
    children: pd.DataFrame,
    period: str,
    end_ord: int,
) -> pd.DataFrame:
    """Per row of the models table (grain, series): the class's seasonality, the series' own seasonal strength
    F_S and, for a group-seasonal series, its group's (NaN otherwise)."""
    grain = models["grain"].to_numpy()
    series = models["series"].to_numpy()
    is_parent = grain == "parent"
    product_class = np.where(
        is_parent,
        parents["product_class"].to_numpy()[np.where(is_parent, series, 0)] if len(parents) else "",
        children["product_class"].to_numpy()[np.where(is_parent, 0, series)] if len(children) else "",
    )
    own = np.full(len(models), np.nan)
    group = np.full(len(models), np.nan)
    for name, grid in (("parent", p_grid), ("leaf", c_grid)):
        rows = grain == name
        own[rows] = series_strength(grid, period, end_ord, series[rows])  # the models' series only
        if season is not None and len(season.strength):
            g = (season.parent_group if name == "parent" else season.child_group)[series[rows]]
            group[rows] = np.where(g >= 0, season.strength[np.maximum(g, 0)], np.nan)
    return pd.DataFrame(
        {
            "seasonality": pd.Series(product_class).map(dict(modes)).fillna(Seasonality.NONE).to_numpy(),
            "seasonal_strength": own,
            "group_seasonal_strength": group,
        }
    )


def choose_seasonality(
    accuracy: pd.DataFrame, seasonality: Mapping[str, str], strategies: Mapping[str, str], candidates: tuple[str, ...]
) -> tuple[pd.DataFrame, dict[str, str]]:
    """The backtest rows of each class's seasonality in effect, and that seasonality per class.

    A class with `seasonality: auto` takes the seasonality under which its
    allowed strategies (all of `candidates` for `strategy: auto`, else its
    configured one) reach the lowest leaf-grain score by the class's
    `selection_metric` (WMAPE or RMSSE, as `strategy_choice` judges the
    strategies; WMAPE for a table without the column); a tie goes to the
    seasonality the backtest compared first (the models' own setting before
    `group`). Any other class keeps its configured one. A table without a
    seasonality column (made before seasonality was compared) is returned
    as it is, every class under its configured seasonality.
    """
    if "seasonality" not in accuracy.columns:
        return accuracy, {n: m for n, m in seasonality.items() if m != AUTO}
    chosen = {}
    keep = np.zeros(len(accuracy), dtype=bool)
    for name in pd.unique(accuracy["product_class"]):  # a loop over classes
        mine = accuracy["product_class"] == name
        variants = list(dict.fromkeys(accuracy.loc[mine, "seasonality"]))
        wanted = seasonality.get(name, AUTO)
        if wanted == AUTO or wanted not in variants:
            allowed = list(candidates) if strategies.get(name, AUTO) == AUTO else [strategies[name]]
            leaf = accuracy[mine & (accuracy["grain"] == "leaf")]
            metric = str(leaf["selection_metric"].iloc[0]) if "selection_metric" in leaf and len(leaf) else "wmape"
            leaf = leaf[(leaf["metric"] == metric) & leaf["strategy"].isin(allowed)]
            best = leaf.groupby("seasonality")["value"].min().reindex(variants).fillna(np.inf)
            wanted = min(variants, key=lambda v: (best[v], variants.index(v)))
        chosen[name] = wanted
        keep |= (mine & (accuracy["seasonality"] == wanted)).to_numpy()
    return accuracy[keep].reset_index(drop=True), chosen
