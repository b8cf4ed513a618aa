"""Assets `parent_forecast`, `statistical_forecast` and `forecast_models`: the forecast rerun and its split."""

import dagster as dg
import pandas as pd

from assets.common import schema_check_spec, table_metadata, validate
from pipelines.partitions import cycle_class_partitions, partition_config
from pipelines.resources import PlanningConfigResource
from pipelines.schemas import ForecastFittedValues, ForecastModels, ParentForecast, StatisticalForecast
from pipelines.stages.backtest_accuracy import choose_strategies
from pipelines.stages.statistical_forecast import forecast_cycle

PARENT_FORECAST = "parent_forecast"
STATISTICAL_FORECAST = "statistical_forecast"
FORECAST_MODELS = "forecast_models"
FORECAST_FITTED_VALUES = "forecast_fitted_values"


@dg.multi_asset(
    group_name="forecast",
    partitions_def=cycle_class_partitions,
    outs={
        PARENT_FORECAST: dg.AssetOut(kinds={"pandas", "duckdb", "statsforecast"}, description="Statistical forecast per product x site, with model, demand class and strategy."),
        STATISTICAL_FORECAST: dg.AssetOut(kinds={"pandas", "duckdb"}, description="Statistical forecast at leaf grain, coherent with the parent by the class's strategy."),
        FORECAST_MODELS: dg.AssetOut(kinds={"pandas", "duckdb"}, description="One row per forecast series: grain, demand class, model and the parameters the library exposes."),
        FORECAST_FITTED_VALUES: dg.AssetOut(kinds={"pandas", "duckdb"}, description="In-sample one-step fitted values behind the residuals of MinT / WLS classes."),
    },
    check_specs=[
        schema_check_spec(PARENT_FORECAST, ParentForecast),
        schema_check_spec(STATISTICAL_FORECAST, StatisticalForecast),
        schema_check_spec(FORECAST_MODELS, ForecastModels),
        schema_check_spec(FORECAST_FITTED_VALUES, ForecastFittedValues),
    ],
    can_subset=False,
)
def statistical_forecast(
    context: dg.AssetExecutionContext,
    planning: PlanningConfigResource,
    lifecycle_history: pd.DataFrame,
    share_tables: pd.DataFrame,
    reinitialized_target: pd.DataFrame,
    cycle_calendar: pd.DataFrame,
    backtest_accuracy: pd.DataFrame,
):
    config = partition_config(context, planning.config)
    cycle_date = pd.Timestamp(cycle_calendar["cycle_date"].iloc[0])
    children = share_tables[["product", "site", "customer", "product_class", "first_active_period", "last_active_period"]]
    choice = choose_strategies(backtest_accuracy, config)
    chosen = dict(zip(choice["product_class"], choice["strategy"]))
    result = forecast_cycle(lifecycle_history, children, reinitialized_target, config, cycle_date, log=context.log.info, chosen=chosen)
    parent, parent_check = validate(result.parent, ParentForecast, PARENT_FORECAST)
    leaf, leaf_check = validate(result.leaf, StatisticalForecast, STATISTICAL_FORECAST)
    models_table, models_check = validate(result.models, ForecastModels, FORECAST_MODELS)
    first = parent.drop_duplicates(["product", "site"])
    models = first.groupby(["product_class", "strategy", "demand_class", "model"]).size().rename("parents").reset_index()
    totals = parent.groupby("product_class")["forecast"].sum().rename("horizon_total").reset_index()
    zeroed = parent[parent["zero_reason"].notna()].groupby("zero_reason").size().rename("parent_periods").reset_index()
    yield dg.Output(
        parent,
        output_name=PARENT_FORECAST,
        metadata=table_metadata(
            parent,
            strategy_by_class=choice,
            models_used=models,
            horizon_total_by_class=totals,
            negatives_set_to_zero=result.negatives_clipped,
            periods_set_to_zero_by_reason=zeroed,
        ),
    )
    basis = leaf.groupby("split_basis").size().rename("rows").reset_index()
    yield dg.Output(leaf, output_name=STATISTICAL_FORECAST, metadata=table_metadata(leaf, split_basis=basis, leaf_total=float(leaf["forecast"].sum())))
    by_model = models_table.groupby(["grain", "product_class", "model"]).size().rename("series").reset_index()
    yield dg.Output(models_table, output_name=FORECAST_MODELS, metadata=table_metadata(models_table, series_by_model=by_model))
    fitted, fitted_check = validate(result.fitted, ForecastFittedValues, FORECAST_FITTED_VALUES)
    yield dg.Output(fitted, output_name=FORECAST_FITTED_VALUES, metadata=table_metadata(fitted, series=int(fitted.drop_duplicates(["grain", "product", "site", "customer"]).shape[0])))
    yield from (parent_check, leaf_check, models_check, fitted_check)
