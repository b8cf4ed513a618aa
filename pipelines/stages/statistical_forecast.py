"""Stage 6, `statistical_forecast`: the forecast rerun, then split to the leaf.

Per product class the forecast runs at the class's `forecast_grain`:

- `product_site` (default): one series per parent, the sum of its children's
  lifecycle history. Each parent's forecast is split pro rata to its children
  by `reinitialized_target`, period by period:
  leaf_{j,h} = F_{P,h} x target_{j,h} / sum_k target_{k,h}; where a parent's
  targets sum to 0 (it fell back to an even split) the period's shares are
  the basis. A parent period whose shares are all 0 (`zero_share_reason`:
  the product or every customer span has ended, or no active child holds a
  share) is forecast as 0 and the reason is kept in `zero_reason`, so the
  children always sum to the parent.
- `product_site_customer`: one series per child (bottom-up); the parent's
  forecast is the sum of its children's. A child is forecast 0 outside its
  active periods (before its span or product starts, after either ends). The
  new-customer share rules do not apply at this grain: each child is
  forecast from its own history.
- `auto`: the strategy the backtest chose for the class (`backtest_accuracy`,
  lowest leaf-grain WMAPE): `top_down` or `bottom_up` as above,
  `forecast_proportions` (parent forecast split by the children's own
  forecasts) or `mint_shrink` / `wls_var` (both grains reconciled); see
  `pipelines.engines.hierarchy`. Whatever the strategy, parent = sum of leaves.

Each series gets a demand class (Syntetos, Boylan & Croston 2005, cut-offs
ADI = 1.32 and CV^2 = 0.49). ADI convention used here: the number of periods
from the series' first non-zero period to the end of history, divided by the
number of non-zero periods. CV^2 is the squared coefficient of variation of
the non-zero sizes (population variance, ddof = 0); one non-zero period has
CV^2 = 0. A series without any demand is `no_demand` and is forecast as 0.
Ties at the cut-offs: the cut-offs belong to the upper side, i.e. smooth needs
ADI < 1.32 and CV^2 < 0.49; ADI = 1.32 exactly is intermittent (or lumpy) and
CV^2 = 0.49 exactly is erratic (or lumpy). The comparison is made on the
floating-point ratio, so 33 periods / 25 demands (1.32) is on the cut-off.

Models (statsforecast): `auto_ets` (AutoETS, Hyndman et al. 2008; seasonal
with `seasonal: true` and two full seasons), `ets_additive_season` (ETS(A,N,A),
the one seasonal ETS form instead of AutoETS' search), `mstl_ets` (MSTL
decomposition with AutoETS on the deseasonalised series; Bandara et al. 2021),
`ses`, `seasonal_naive` (the benchmark), Croston (`croston_classic`,
`croston_sba` = Syntetos & Boylan 2005 debiasing, `croston_optimized`), `tsb`
(Teunter, Syntetos & Babai 2011, parameters in config), `adida`
(Nikolopoulos et al. 2011) and `imapa`. Seasonal AutoETS on weekly data is
costly: on the demo's 28 seasonal parents (156 weeks, 1 core) AutoETS with
season_length 52 took 300-560 ms per series and picked unstable multiplicative
forms (26-week holdout WMAPE 1.80); ETS(A,N,A) took 45-57 ms (WMAPE 0.27),
MSTL + AutoETS 45-50 ms (0.39) and seasonal naive 0.4 ms (0.28). So the demo
uses `ets_additive_season` where a season is wanted (benchmarks/backtest.py
measures again). The model, its parameters where the library exposes them (ETS
component string and smoothing parameters, the fixed Croston alpha, the TSB
alphas) and the in-sample one-step fitted values (for MinT's residuals) come
out of `run_model_groups`.

The model per demand class comes from the config and runs through
statsforecast; a model that fails on a series falls back to the naive
forecast. Negative forecasts (possible from a trended ETS) are set to 0.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import pandas as pd

from pipelines.calendar import horizon_starts, ordinal_to_start, period_ordinal
from pipelines.config import PlanningConfig
from pipelines.engines.hierarchy import coherent_forecasts
from pipelines.engines.models import BaseForecasts, ModelSettings, SeriesGrid, base_forecasts, series_grid
from pipelines.errors import ConfigError
from pipelines.keys import LEAF, PARENT, factorize, first_rows, lookup

PARENT_COLUMNS = ["cycle_date", "product_class", "product", "site", "period_start", "forecast", "model", "demand_class", "forecast_grain", "zero_reason"]
LEAF_COLUMNS = LEAF + ["period_start", "cycle_date", "product_class", "forecast", "parent_forecast", "split_basis"]
FITTED_COLUMNS = ["cycle_date", "grain", "product_class", "product", "site", "customer", "period_start", "actual", "fitted"]
MODEL_COLUMNS = ["cycle_date", "grain", "product_class", "product", "site", "customer", "demand_class", "adi", "cv2", "model", "parameters"]
GRAIN_STRATEGY = {"product_site": "top_down", "product_site_customer": "bottom_up"}


@dataclass(frozen=True)
class ForecastResult:
    parent: pd.DataFrame
    leaf: pd.DataFrame
    negatives_clipped: int
    models: pd.DataFrame | None = None  # one row per forecast series: grain, key, model, parameters
    fitted: pd.DataFrame | None = None  # in-sample one-step fitted values behind MinT / WLS residuals


def strategy_by_class(config: PlanningConfig, chosen: dict[str, str] | None = None) -> dict[str, str]:
    """The strategy each product class follows: its fixed grain's, or for `auto` the backtest's choice."""
    out = {}
    for name, pc in config.product_classes.items():
        if pc.forecast_grain == "auto":
            if not chosen or name not in chosen:
                raise ConfigError(
                    f"{config.source}: product_classes.{name}.forecast_grain is 'auto' but the backtest "
                    f"made no choice for it; materialize backtest_accuracy first, or set forecast_grain to "
                    f"one of {sorted(GRAIN_STRATEGY)}."
                )
            out[name] = chosen[name]
        else:
            out[name] = GRAIN_STRATEGY[pc.forecast_grain]
    return out


def combine_strategies(
    strategy_of_parent: np.ndarray,
    base: BaseForecasts,
    parent_of_child: np.ndarray,
    basis: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, int]:
    """Coherent (parent, leaf, leaf source, negatives set to 0), each parent by its own strategy."""
    n_parents = len(strategy_of_parent)
    parent = np.zeros_like(base.parent_fc)
    leaf = np.zeros_like(base.leaf_fc)
    source = np.empty(leaf.shape, dtype=object)
    negatives = 0
    for strategy in pd.unique(strategy_of_parent):  # a handful of strategies, not a loop over series
        ps = strategy_of_parent == strategy
        cs = ps[parent_of_child]
        remap = np.cumsum(ps) - 1
        p, l, src, neg = coherent_forecasts(
            strategy,
            base.parent_fc[ps],
            base.leaf_fc[cs],
            remap[parent_of_child[cs]],
            basis[cs],
            None if base.parent_res is None else base.parent_res[ps],
            None if base.leaf_res is None else base.leaf_res[cs],
        )
        parent[ps], leaf[cs], source[cs] = p, l, src
        negatives += neg
    assert n_parents == parent.shape[0]
    return parent, leaf, source, negatives


def forecast_cycle(
    history: pd.DataFrame,
    children: pd.DataFrame,
    target: pd.DataFrame,
    config: PlanningConfig,
    cycle_date: pd.Timestamp,
    log: Callable[[str], None] | None = None,
    chosen: dict[str, str] | None = None,
) -> ForecastResult:
    """Parent and leaf forecasts for the horizon; see the module docstring.

    `chosen` maps each `auto` class to the strategy the backtest picked.
    children: leaf keys and product_class, optionally first/last_active_period
    (absent = active in the whole horizon). target: `reinitialized_target`.
    """
    period = config.calendar.period
    horizon = config.calendar.horizon
    cycle_ord = int(period_ordinal(pd.DatetimeIndex([cycle_date]), period)[0])
    starts = horizon_starts(cycle_date, horizon, period)
    children = children.reset_index(drop=True)
    parent_of_child, parents = factorize(children, PARENT)
    parents["product_class"] = children["product_class"].to_numpy()[first_rows(parent_of_child)]
    n_parents, n_children = len(parents), len(children)
    ords = period_ordinal(history["period_start"], period)
    qty = history["quantity"].to_numpy(float)
    strategies = strategy_by_class(config, chosen)

    p_code = lookup(history, PARENT, parents)
    ok = p_code >= 0
    p_grid = series_grid(p_code[ok], ords[ok], qty[ok], n_parents, cycle_ord)
    c_code = lookup(history, LEAF, children)
    okc = c_code >= 0
    c_grid = series_grid(c_code[okc], ords[okc], qty[okc], n_children, cycle_ord)
    base = base_forecasts(
        p_grid, c_grid, parents["product_class"].to_numpy(), children["product_class"].to_numpy(), strategies,
        ModelSettings.of(config), horizon, log,
    )

    # top-down basis: the reinitialized target (the period's share where the targets are all 0)
    target_m = _leaf_matrix(target, children, "target", starts)
    share_m = _leaf_matrix(target, children, "share", starts)
    target_sum = np.zeros((n_parents, horizon))
    np.add.at(target_sum, parent_of_child, target_m)
    use_target = target_sum[parent_of_child] > 0
    basis = np.where(use_target, target_m, share_m)

    strategy_of_parent = parents["product_class"].map(strategies).to_numpy()
    parent_fc, leaf_fc, source, reconciled_negatives = combine_strategies(strategy_of_parent, base, parent_of_child, basis)
    split_basis = np.where(source == "basis", np.where(use_target, "target", "share"), source)

    # lifecycle: no leaf volume outside a child's active periods, none in a parent period that no
    # child can carry (a share-split parent: no child holds a share; otherwise: no child is active);
    # parents are then re-summed from their leaves so every strategy stays coherent
    active = _active_matrix(children, starts, period)
    zero_reason = _parent_reasons(target, parents, starts)
    no_active_child = np.isin(zero_reason, ["product_not_active", "no_active_child"])
    zeroed = np.where((strategy_of_parent == "top_down")[:, None], pd.notna(zero_reason), no_active_child)
    zero_reason = np.where(zeroed, zero_reason, None)
    leaf_fc = np.where(active & ~zeroed[parent_of_child], leaf_fc, 0.0)
    parent_fc = np.zeros_like(parent_fc)
    np.add.at(parent_fc, parent_of_child, leaf_fc)
    parent_model = np.where(strategy_of_parent == "bottom_up", "bottom_up", base.parent_label)
    grain = np.select(
        [strategy_of_parent == "top_down", strategy_of_parent == "bottom_up"], ["product_site", "product_site_customer"], "both"
    )

    parent_out = parents[PARENT].loc[parents.index.repeat(horizon)].reset_index(drop=True)
    parent_out.insert(0, "product_class", np.repeat(parents["product_class"].to_numpy(), horizon))
    parent_out.insert(0, "cycle_date", cycle_date)
    parent_out["period_start"] = np.tile(starts.values, n_parents)
    parent_out["forecast"] = parent_fc.ravel()
    parent_out["model"] = np.repeat(parent_model, horizon)
    parent_out["demand_class"] = np.repeat(base.parent_demand, horizon)
    parent_out["forecast_grain"] = np.repeat(grain, horizon)
    parent_out["strategy"] = np.repeat(strategy_of_parent, horizon)
    parent_out["zero_reason"] = zero_reason.ravel()

    leaf_out = children[LEAF].loc[children.index.repeat(horizon)].reset_index(drop=True)
    leaf_out["period_start"] = np.tile(starts.values, n_children)
    leaf_out["cycle_date"] = cycle_date
    leaf_out["product_class"] = np.repeat(children["product_class"].to_numpy(), horizon)
    leaf_out["forecast"] = leaf_fc.ravel()
    leaf_out["parent_forecast"] = parent_fc[parent_of_child].ravel()
    leaf_out["split_basis"] = split_basis.ravel()

    models = base.models
    is_parent = (models["grain"] == "parent").to_numpy()
    keys = pd.concat(
        [parents.iloc[models["series"].to_numpy()[is_parent]][PARENT + ["product_class"]].assign(customer=""),
         children.iloc[models["series"].to_numpy()[~is_parent]][LEAF + ["product_class"]]],
        ignore_index=True,
    )
    models = pd.concat([models.drop(columns="series").reset_index(drop=True), keys], axis=1)
    models.insert(0, "cycle_date", cycle_date)
    fitted = pd.concat(
        [_fitted_frame(p_grid, base.parent_fitted, parents.assign(customer=""), "parent", period),
         _fitted_frame(c_grid, base.leaf_fitted, children, "leaf", period)],
        ignore_index=True,
    )
    fitted.insert(0, "cycle_date", cycle_date)
    return ForecastResult(
        parent=parent_out[PARENT_COLUMNS + ["strategy"]],
        leaf=leaf_out[LEAF_COLUMNS],
        negatives_clipped=base.negatives + reconciled_negatives,
        models=models[MODEL_COLUMNS],
        fitted=fitted[FITTED_COLUMNS],
    )


def _fitted_frame(grid: SeriesGrid, fitted: np.ndarray | None, keys: pd.DataFrame, grain: str, period: str) -> pd.DataFrame:
    """Long frame of the grid rows that have a fitted value: keys, period_start, actual, fitted."""
    if fitted is None:
        fitted = np.full(len(grid.y), np.nan)
    ok = np.isfinite(fitted)
    out = keys.iloc[grid.series[ok]][LEAF].reset_index(drop=True)
    out.insert(0, "grain", grain)
    out["product_class"] = keys["product_class"].to_numpy()[grid.series[ok]]
    out["period_start"] = ordinal_to_start(grid.ordinal[ok], period)
    out["actual"] = grid.y[ok]
    out["fitted"] = fitted[ok]
    return out


def _active_matrix(children: pd.DataFrame, starts: pd.DatetimeIndex, period: str) -> np.ndarray:
    """(n_children, horizon) bool: the child is active in the period (all True without the span columns)."""
    if not {"first_active_period", "last_active_period"} <= set(children.columns):
        return np.ones((len(children), len(starts)), dtype=bool)
    h = period_ordinal(starts, period)[None, :]
    first = period_ordinal(pd.DatetimeIndex(children["first_active_period"]), period)[:, None]
    last = period_ordinal(pd.DatetimeIndex(children["last_active_period"]), period)[:, None]
    return (h >= first) & (h <= last)


def _parent_reasons(target: pd.DataFrame, parents: pd.DataFrame, starts: pd.DatetimeIndex) -> np.ndarray:
    """(n_parents, horizon) zero_share_reason of each parent period (None where its shares sum to 1)."""
    out = np.full((len(parents), len(starts)), None, dtype=object)
    if target.empty or "zero_share_reason" not in target.columns:
        return out
    rows = target[target["zero_share_reason"].notna()]
    row = lookup(rows, PARENT, parents)
    col = pd.DatetimeIndex(starts).get_indexer(pd.DatetimeIndex(rows["period_start"]))
    ok = (row >= 0) & (col >= 0)
    out[row[ok], col[ok]] = rows["zero_share_reason"].to_numpy(object)[ok]
    return out


def _leaf_matrix(frame: pd.DataFrame, children: pd.DataFrame, column: str, starts: pd.DatetimeIndex) -> np.ndarray:
    """(n_children, horizon) matrix of `column` from a long leaf x period frame (0 where absent)."""
    out = np.zeros((len(children), len(starts)))
    if frame.empty:
        return out
    row = lookup(frame, LEAF, children)
    col = pd.DatetimeIndex(starts).get_indexer(pd.DatetimeIndex(frame["period_start"]))
    ok = (row >= 0) & (col >= 0)
    out[row[ok], col[ok]] = frame[column].to_numpy(float)[ok]
    return out
