"""Stage 6, `statistical_forecast`: the forecast rerun, then made coherent down to the leaf.

Per product class the forecast follows the class's `strategy` (for `auto`,
the one the backtest chose, read from the stored `strategy_choice`):

- `top_down`: one series per parent, the sum of its children's lifecycle
  history. Each parent's forecast is split pro rata to its children by
  `reinitialized_target`, period by period:
  leaf_{j,h} = F_{P,h} x target_{j,h} / sum_k target_{k,h} (basis
  `reinitialized_target`); where a parent's targets sum to 0 (it fell back to
  an even split) the period's shares are the basis (`period_share`). A parent
  period whose shares are all 0 (`zero_reason`: the product or every customer
  span has ended, or no active child holds a share) is forecast as 0 and the
  reason is kept in `zero_reason`.
- `bottom_up`: one series per child (basis `leaf_forecast`); the parent's
  forecast is the sum of its children's. A child is forecast 0 outside its
  active periods (before its span or product starts, after either ends). The
  new-customer share rules do not apply: each child is forecast from its own
  history.
- `forecast_proportions` (parent forecast split by the children's own
  forecasts, basis `children_forecast`) or `mint_shrink` / `wls_var` (both
  grains reconciled, basis `reconciled`); see `pipelines.engines.hierarchy`.

Every strategy works on the children active in the period (an inactive child's forecast and basis are 0; MinT
reconciles the period's sub-hierarchy), so no volume is given to a child that cannot carry it.
`strategy_forecast` keeps the parent as the strategy produced it: the
model's forecast (top-down, forecast proportions), the reconciled parent
(MinT, WLS; negative reconciled leaves are set to 0 and their amount taken
from the other children of the period in proportion, so the reconciled
parent keeps its volume, and the count and volume are in the metadata), or the
sum of the active children's own forecasts (bottom-up). The only change after
the strategy is the lifecycle's: a parent period no child can carry (a
top-down parent with a `zero_reason`; another strategy's when no child is
active or, with a `zero_reason`, none took any volume) is set to 0, parent and
leaves, and keeps its `zero_reason`; `forecast` is `strategy_forecast`
elsewhere. The leaves are never re-summed into the parent:
`pipelines.stages.reconciliation` proves they sum to `strategy_forecast`.

Each class's `seasonality` (`pipelines.engines.seasonal_base`; for `auto`
the backtest's choice in `strategy_choice`), prediction intervals per level
of `intervals.levels` (`pipelines.engines.forecast_intervals`) and the levels
above the parent, `hierarchy.upper_levels` (`pipelines.engines.upper_levels`,
table `upper_level_forecast`) are made by their engines.

The models, demand classes and their conventions are in `pipelines.engines.models`. Negative base forecasts
(possible from a trended ETS) are set to 0 before the strategy. `model_grain` says at which grains the class's
models ran (parent, leaf or both).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from pipelines.calendar import horizon_starts, period_ordinal
from pipelines.checks import NO_NEGATIVE_FORECAST, NO_VOLUME_AFTER_PHASE_OUT, NO_VOLUME_OUTSIDE_ACTIVE_SPAN
from pipelines.engines import seasonal_base as sb
from pipelines.engines.base_forecasts import base_forecasts, series_to_fit
from pipelines.engines.forecast_frames import (
    active_matrix,
    basis_column,
    combine_strategies,
    fitted_frame,
    leaf_matrix,
    long_frame,
    model_keys,
    parent_reasons,
    repeated,
)
from pipelines.engines.forecast_intervals import interval_frames
from pipelines.engines.hierarchy import NEEDS_LEAF, parent_sums
from pipelines.engines.models import ModelSettings
from pipelines.engines.proofs import find_negative, find_volume_after_phase_out, find_volume_outside_active_span
from pipelines.engines.series_grids import history_grid, series_grid
from pipelines.engines.upper_levels import upper_level_checks, upper_levels_run
from pipelines.errors import ConfigError
from pipelines.keys import LEAF, PARENT, PARENT_ID, factorize, first_rows, ids_in, rows_in
from pipelines.progress import SeriesProgress
from pipelines.results import CheckRows, Log, StageResult, quiet
from pipelines.vocabulary import AUTO, Basis, ModelGrain, Strategy, ZeroReason, values

LEAF_COLUMNS = LEAF + ["period_start", "cycle_date", "product_class", "forecast", "parent_forecast", "basis"]
FITTED_COLUMNS = [
    "cycle_date", "grain", "product_class", "product", "site", "customer", "period_start", "actual", "fitted",
]
MODEL_COLUMNS = [
    "cycle_date", "grain", "product_class", "product", "site", "customer", "demand_class", "adi", "cv2",
    "model", "parameters", "seasonality", "seasonal_strength", "group_seasonal_strength",
]


@dataclass(frozen=True)
class ForecastResult:
    parent: pd.DataFrame
    leaf: pd.DataFrame
    negatives_clipped: int
    reconciled_negatives: int = 0  # reconciled leaf values set from negative to 0, their amount moved
    redistributed: pd.DataFrame | None = None  # parent periods whose negative reconciled leaves were moved
    models: pd.DataFrame | None = None  # one row per forecast series: grain, key, model, parameters
    fitted: pd.DataFrame | None = None  # in-sample one-step fitted values behind MinT / WLS residuals
    upper: pd.DataFrame | None = None  # upper_level_forecast: the levels above the parent (hierarchy.upper_levels)
    basis_rows: pd.DataFrame | None = None  # statistical_forecast's rows per basis (`basis`, `rows`)
    # one row per parent, in the parent table's order: product_class, strategy, demand_class, model (the values
    # every one of the parent's rows carries), for the metadata's count of parents per model
    parent_models: pd.DataFrame | None = None


@dataclass(frozen=True)
class ForecastSettings:
    """What the forecast reads: the calendar, each class's configured strategy, the models, the config file."""

    period: str
    horizon: int
    strategies: Mapping[str, str]
    models: ModelSettings
    source: Path = Path("<memory>")
    seasonality: Mapping[str, str] = field(default_factory=dict)  # class -> none | own | group | auto
    seasonal_groups: Mapping[str, str] = field(default_factory=dict)  # class -> seasonal_group
    levels: tuple[float, ...] = ()  # prediction interval levels (%)
    upper_levels: tuple[str, ...] = ()  # aggregation levels above the parent, bottom to top
    residual_start: int | None = None  # a shard: its class's first period starts the MinT / WLS residual window

    @classmethod
    def of(cls, config) -> ForecastSettings:
        """From a planning config (every class it holds); a ForecastSettings is returned as it is."""
        if isinstance(config, ForecastSettings):
            return config
        classes = config.product_classes
        return cls(
            config.calendar.period, config.calendar.horizon, {name: pc.strategy for name, pc in classes.items()},
            ModelSettings.of(config), config.source,
            {name: sb.configured_seasonality(pc) for name, pc in classes.items()},
            {name: pc.seasonal_group for name, pc in classes.items()},
            tuple(config.intervals.levels), tuple(config.hierarchy.upper_levels),
        )


def strategy_by_class(settings: ForecastSettings, chosen: dict[str, str] | None = None) -> dict[str, str]:
    """The strategy each product class follows: its configured one, or for `auto` the backtest's choice."""
    out = {}
    for name, configured in settings.strategies.items():
        if configured == AUTO:
            if not chosen or name not in chosen:
                raise ConfigError(
                    f"{settings.source}: product_classes.{name}.strategy is 'auto' but the backtest "
                    f"made no choice for it; materialize backtest_accuracy and strategy_choice first, or set "
                    f"strategy to one of {sorted(values(Strategy))}."
                )
            out[name] = chosen[name]
        else:
            out[name] = configured
    return out


def forecast_cycle(
    history: pd.DataFrame,
    children: pd.DataFrame,
    target: pd.DataFrame,
    settings: ForecastSettings,
    cycle_date: pd.Timestamp,
    log: Callable[[str], None] | None = None,
    chosen: dict[str, str] | None = None,
    products: pd.DataFrame | None = None,
    chosen_seasonality: dict[str, str] | None = None,
) -> ForecastResult:
    """Parent and leaf forecasts for the horizon; see the module docstring.

    `chosen` maps each `auto` class to the strategy the backtest picked.
    children: leaf keys and product_class, optionally first/last_active_period
    (absent = active in the whole horizon). target: `reinitialized_target`.
    """
    settings = ForecastSettings.of(settings)
    period = settings.period
    horizon = settings.horizon
    cycle_ord = int(period_ordinal(pd.DatetimeIndex([cycle_date]), period)[0])
    starts = horizon_starts(cycle_date, horizon, period)
    children = children.reset_index(drop=True)
    parent_of_child, parents = factorize(children, PARENT)
    parents["product_class"] = children["product_class"].to_numpy()[first_rows(parent_of_child)]
    ids, parent_ids = ids_in(children), ids_in(children, (PARENT_ID,))  # carried from the share table
    parents[parent_ids] = children[parent_ids].to_numpy()[first_rows(parent_of_child)]
    n_parents, n_children = len(parents), len(children)
    strategies = strategy_by_class(settings, chosen)

    # each history row's parent and child, through the ids both carry (else by their distinct keys only)
    p_grid = history_grid(history, parents, PARENT, cycle_ord, period)
    parent_class, child_class = parents["product_class"].to_numpy(), children["product_class"].to_numpy()
    leaf_grain = np.isin(child_class, [n for n, s in strategies.items() if s in NEEDS_LEAF])
    if leaf_grain.any():  # the children's own series laid out only where their class forecasts leaves
        c_grid = history_grid(history, children, LEAF, cycle_ord, period, keep=leaf_grain)
    else:
        c_grid = series_grid(np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0), n_children, cycle_ord)
    modes = sb.seasonality_in_effect(settings.seasonality, chosen_seasonality, settings.source)
    season = sb.cycle_season_plan(
        p_grid, parents, products, modes, settings.seasonal_groups, parent_of_child, period, cycle_ord
    )
    fits = SeriesProgress(series_to_fit(parent_class, child_class, strategies), log)
    base = base_forecasts(
        p_grid, c_grid, parent_class, child_class, strategies, settings.models, horizon, log, progress=fits.advance,
        seasonality=modes, season=season, sd=bool(settings.levels), residual_start=settings.residual_start,
    )

    # top-down basis: the reinitialized target (the period's share where the targets are all 0)
    target_m, share_m = leaf_matrix(target, children, ["target", "share"], starts)
    target_sum = parent_sums(target_m, parent_of_child, n_parents)
    use_target = target_sum[parent_of_child] > 0
    basis = np.where(use_target, target_m, share_m)

    strategy_of_parent = parents["product_class"].map(strategies).to_numpy()
    base, tree_sd, upper = upper_levels_run(  # MinT / WLS over the tree with the levels above the parent
        settings.upper_levels, parents, products, parent_of_child, p_grid, c_grid, base, strategy_of_parent,
        settings.models, horizon, bool(settings.levels), f"{settings.source}: hierarchy.upper_levels", log,
    )
    # each strategy works on the children active in the period: an inactive child takes no volume
    active = active_matrix(children, starts, period)
    made = combine_strategies(strategy_of_parent, base, parent_of_child, basis, active)
    strategy_fc, leaf_fc = made.parent, made.leaf
    labels = np.array([Basis.REINITIALIZED_TARGET.value, Basis.PERIOD_SHARE.value], dtype=object)  # no text copies
    basis, basis_rows = basis_column(made.source, use_target, labels)

    # lifecycle: a parent period that no child can carry is set to 0 with its zero_reason (a share-split
    # parent: no child holds a share; otherwise: no child is active, or none took any of the volume).
    # Every other parent period keeps the strategy's value, and its leaves must sum to it (the check
    # children_sum_to_parent compares them with strategy_forecast, never with a sum of the leaves)
    zero_reason = parent_reasons(target, parents, starts)
    no_active_child = np.isin(zero_reason, [ZeroReason.PRODUCT_NOT_ACTIVE, ZeroReason.NO_ACTIVE_CHILD])
    carried = parent_sums(np.abs(leaf_fc), parent_of_child, n_parents) > 0
    zeroed = pd.notna(zero_reason) & (
        (strategy_of_parent == Strategy.TOP_DOWN)[:, None] | no_active_child | ~carried
    )
    zero_reason = np.where(zeroed, zero_reason, None)
    leaf_fc = np.where(zeroed[parent_of_child], 0.0, leaf_fc)
    parent_fc = np.where(zeroed, 0.0, strategy_fc)
    parent_model = np.where(strategy_of_parent == "bottom_up", "bottom_up", base.parent_label)
    grain = np.select(
        [strategy_of_parent == "top_down", strategy_of_parent == "bottom_up"],
        [ModelGrain.PARENT, ModelGrain.LEAF],
        ModelGrain.BOTH,
    )

    p_bounds, l_bounds = interval_frames(
        settings.levels, strategy_of_parent, parent_of_child, base, parent_fc, leaf_fc, zeroed,
        zeroed[parent_of_child] | ~active, tree_sd,
    )

    # the long tables made once, in their columns' order, from arrays made for them (no copy, no reordering)
    parent_out = long_frame(
        {"cycle_date": cycle_date, "product_class": np.repeat(parent_class, horizon)},
        repeated(parents[PARENT], horizon), {"period_start": np.tile(starts.values, n_parents)},
        {"forecast": parent_fc.ravel(), "strategy_forecast": strategy_fc.ravel(),
         "model": np.repeat(parent_model, horizon), "demand_class": np.repeat(base.parent_demand, horizon),
         "model_grain": np.repeat(grain, horizon), "zero_reason": zero_reason.ravel(),
         "strategy": np.repeat(strategy_of_parent, horizon)},
        p_bounds, repeated(parents[parent_ids], horizon),
    )
    leaf_out = long_frame(
        repeated(children[LEAF], horizon), {"period_start": np.tile(starts.values, n_children)},
        {"cycle_date": cycle_date, "product_class": np.repeat(child_class, horizon), "forecast": leaf_fc.ravel(),
         "parent_forecast": parent_fc[parent_of_child].ravel(), "basis": basis.ravel()},
        l_bounds, repeated(children[ids], horizon),
    )
    models = pd.concat(
        [model_keys(base.models, parents, children),
         sb.strength_columns(base.models, p_grid, c_grid, season, modes, parents, children, period, cycle_ord)], axis=1
    )
    models.insert(0, "cycle_date", cycle_date)
    fitted = pd.concat(
        [fitted_frame(p_grid, base.parent_fitted, parents.assign(customer=""), "parent", period),
         fitted_frame(c_grid, base.leaf_fitted, children, "leaf", period)],
        ignore_index=True,
    )
    fitted.insert(0, "cycle_date", cycle_date)
    parent_models = pd.DataFrame(
        {"product_class": parent_class, "strategy": strategy_of_parent, "demand_class": base.parent_demand,
         "model": parent_model}, copy=False,
    )
    moved = made.moved.ravel()
    redistributed = parent_out.loc[moved > 0, PARENT + ["period_start", "strategy_forecast"]].assign(
        volume_moved=moved[moved > 0]
    )
    return ForecastResult(
        upper=upper.frame(cycle_date, starts, strategy_fc, parent_fc),
        parent=parent_out,
        leaf=leaf_out,
        negatives_clipped=base.negatives + made.negatives,
        reconciled_negatives=made.negatives,
        redistributed=redistributed.reset_index(drop=True),
        models=models[MODEL_COLUMNS],
        fitted=fitted[FITTED_COLUMNS],
        basis_rows=basis_rows,
        parent_models=parent_models,
    )


def run(
    lifecycle_history: pd.DataFrame,
    share_tables: pd.DataFrame,
    reinitialized_target: pd.DataFrame,
    cycle_calendar: pd.DataFrame,
    strategy_choice: pd.DataFrame,
    customer_spans: pd.DataFrame,
    products: pd.DataFrame,
    settings: ForecastSettings,
    log: Log = quiet,
) -> StageResult:
    """parent_forecast, statistical_forecast, forecast_models and forecast_fitted_values, and the forecast's checks."""
    cycle_date = pd.Timestamp(cycle_calendar["cycle_date"].iloc[0])
    columns = [*LEAF, "product_class", "first_active_period", "last_active_period", *ids_in(share_tables)]
    chosen = dict(zip(strategy_choice["product_class"], strategy_choice["strategy"], strict=False))
    seasonality = strategy_choice.get("seasonality", pd.Series("", index=strategy_choice.index))
    chosen_seasonality = dict(zip(strategy_choice["product_class"], seasonality, strict=False))
    result = forecast_cycle(
        lifecycle_history, share_tables[columns], reinitialized_target, settings, cycle_date, log, chosen,
        products, chosen_seasonality,
    )
    parent, leaf, models, fitted = result.parent, result.leaf, result.models, result.fitted
    by_model = result.parent_models.groupby(["product_class", "strategy", "demand_class", "model"])
    used = by_model.size().rename("parents").reset_index()
    zeroed = (
        parent[parent["zero_reason"].notna()]
        .groupby("zero_reason")
        .agg(parent_periods=("forecast", "size"), strategy_volume_not_planned=("strategy_forecast", "sum"))
        .reset_index()
    )
    moved = result.redistributed if result.redistributed is not None else pd.DataFrame()
    return StageResult(
        outputs={
            "parent_forecast": parent,
            "statistical_forecast": leaf,
            "forecast_models": models,
            "forecast_fitted_values": fitted,
            "upper_level_forecast": result.upper,
        },
        metadata={
            "parent_forecast": {
                "strategy_by_class": strategy_choice,
                "models_used": used,
                "horizon_total_by_class": parent.groupby("product_class")["forecast"]
                .sum()
                .rename("horizon_total")
                .reset_index(),
                "negatives_set_to_zero": result.negatives_clipped,
                "periods_set_to_zero_by_reason": zeroed,
                "parent_periods_set_to_zero": int(parent["zero_reason"].notna().sum()),
            },
            "statistical_forecast": {
                "basis": result.basis_rows,  # the leaf rows per basis, counted as the column was made
                "leaf_total": float(leaf["forecast"].sum()),
                # MinT / WLS leaves below 0 set to 0, their amount taken in proportion from the other
                # children of the period (pipelines.engines.hierarchy.nonnegative_keeping_parent)
                "reconciled_negatives_set_to_zero": result.reconciled_negatives,
                "parent_periods_redistributed": len(moved),
                "volume_redistributed": float(moved["volume_moved"].sum()) if len(moved) else 0.0,
                "redistributed_parent_periods": moved.sort_values("volume_moved", ascending=False)
                if len(moved)
                else "none",
            },
            "forecast_models": {
                "series_by_model": models.groupby(["grain", "product_class", "model"])
                .size()
                .rename("series")
                .reset_index()
            },
            "forecast_fitted_values": {
                "series": int(fitted.drop_duplicates(["grain", "product", "site", "customer"]).shape[0])
            },
            "upper_level_forecast": {
                "levels": ", ".join(settings.upper_levels) or "none",
                "nodes": int(result.upper[["level", "node"]].drop_duplicates().shape[0]),
            },
        },
        checks={
            **forecast_checks(parent, leaf, customer_spans, products, settings.period),
            **upper_level_checks(result.upper, parent, products, settings.upper_levels),
        },
    )


def forecast_checks(
    parent_forecast: pd.DataFrame,
    statistical_forecast: pd.DataFrame,
    customer_spans: pd.DataFrame,
    products: pd.DataFrame,
    period: str,
) -> dict[str, CheckRows]:
    """The forecast's checks, judged from its two tables and the master data (`pipelines.engines.proofs`)."""
    negatives = [find_negative(parent_forecast).assign(grain="parent"), find_negative(statistical_forecast)]
    negatives = pd.concat([negatives[0], negatives[1].assign(grain="leaf")], ignore_index=True)
    leaf, spans, span_rows = statistical_forecast, customer_spans, rows_in(statistical_forecast, customer_spans, LEAF)
    return {
        NO_VOLUME_AFTER_PHASE_OUT: CheckRows(find_volume_after_phase_out(leaf, spans, period, span_rows)),
        NO_VOLUME_OUTSIDE_ACTIVE_SPAN: CheckRows(
            find_volume_outside_active_span(parent_forecast, leaf, spans, products, period, span_rows)
        ),
        NO_NEGATIVE_FORECAST: CheckRows(negatives),
    }
