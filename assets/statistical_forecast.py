"""Assets `parent_forecast` and `statistical_forecast`: the forecast rerun and its split."""

import dagster as dg
import pandas as pd

from assets.common import schema_check_spec, table_metadata, validate
from pipelines.resources import PlanningConfigResource
from pipelines.schemas import ParentForecast, StatisticalForecast
from pipelines.stages.statistical_forecast import forecast_cycle

PARENT_FORECAST = "parent_forecast"
STATISTICAL_FORECAST = "statistical_forecast"


@dg.multi_asset(
    group_name="forecast",
    outs={
        PARENT_FORECAST: dg.AssetOut(kinds={"pandas", "duckdb", "statsforecast"}, description="Statistical forecast per product x site, with model and demand class."),
        STATISTICAL_FORECAST: dg.AssetOut(kinds={"pandas", "duckdb"}, description="Statistical forecast at leaf grain, split pro rata by the reinitialized target."),
    },
    check_specs=[schema_check_spec(PARENT_FORECAST, ParentForecast), schema_check_spec(STATISTICAL_FORECAST, StatisticalForecast)],
    can_subset=False,
)
def statistical_forecast(
    context: dg.AssetExecutionContext,
    planning: PlanningConfigResource,
    lifecycle_history: pd.DataFrame,
    share_tables: pd.DataFrame,
    reinitialized_target: pd.DataFrame,
    cycle_calendar: pd.DataFrame,
):
    config = planning.config
    cycle_date = pd.Timestamp(cycle_calendar["cycle_date"].iloc[0])
    children = share_tables[["product", "site", "customer", "product_class", "first_active_period", "last_active_period"]]
    result = forecast_cycle(lifecycle_history, children, reinitialized_target, config, cycle_date, log=context.log.info)
    parent, parent_check = validate(result.parent, ParentForecast, PARENT_FORECAST)
    leaf, leaf_check = validate(result.leaf, StatisticalForecast, STATISTICAL_FORECAST)
    first = parent.drop_duplicates(["product", "site"])
    models = first.groupby(["product_class", "demand_class", "model"]).size().rename("parents").reset_index()
    totals = parent.groupby("product_class")["forecast"].sum().rename("horizon_total").reset_index()
    zeroed = parent[parent["zero_reason"].notna()].groupby("zero_reason").size().rename("parent_periods").reset_index()
    yield dg.Output(
        parent,
        output_name=PARENT_FORECAST,
        metadata=table_metadata(
            parent,
            models_used=models,
            horizon_total_by_class=totals,
            negatives_set_to_zero=result.negatives_clipped,
            periods_set_to_zero_by_reason=zeroed,
        ),
    )
    basis = leaf.groupby("split_basis").size().rename("rows").reset_index()
    yield dg.Output(leaf, output_name=STATISTICAL_FORECAST, metadata=table_metadata(leaf, split_basis=basis, leaf_total=float(leaf["forecast"].sum())))
    yield from (parent_check, leaf_check)
