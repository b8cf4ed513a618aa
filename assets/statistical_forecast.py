"""Assets `parent_forecast`, `statistical_forecast`, `forecast_models`, `forecast_fitted_values`,
`upper_level_forecast`: the forecast rerun."""

import dataclasses
from pathlib import Path

import pandas as pd

from assets.factory import Partition, StageAsset, Table, stage_asset
from pipelines.calendar import period_ordinal
from pipelines.resources import read_table
from pipelines.stages import statistical_forecast as stage

PARENT_FORECAST = "parent_forecast"
STATISTICAL_FORECAST = "statistical_forecast"
FORECAST_MODELS = "forecast_models"
FORECAST_FITTED_VALUES = "forecast_fitted_values"
UPPER_LEVEL_FORECAST = "upper_level_forecast"

def forecast_settings(part: Partition) -> stage.ForecastSettings:
    """The forecast's settings; a shard's start the MinT / WLS residual window at its class's first period (its
    `cycle_calendar`'s history_start, the class's: `assets.cleaned_history.class_first_period`)."""
    settings = stage.ForecastSettings.of(part.config)
    if part.shard is None:
        return settings
    store, name = Path(part.config.store.path), part.shard.name
    calendar = read_table(store, "cycle_calendar", cycle=part.cycle, product_class=part.product_class,
                          versions="latest", shard=name)
    start = calendar["history_start"].dropna() if calendar is not None else pd.Series(dtype="datetime64[ns]")
    if start.empty:
        return settings
    first = int(period_ordinal(pd.DatetimeIndex([start.iloc[0]]), settings.period)[0])
    return dataclasses.replace(settings, residual_start=first)


statistical_forecast = stage_asset(
    StageAsset(
        tables=(
            Table(
                STATISTICAL_FORECAST,
                "Statistical forecast at leaf grain, coherent with the parent by the class's strategy.",
            ),
            Table(
                PARENT_FORECAST,
                "Statistical forecast per product x site, with model, demand class and strategy.",
                frozenset({"pandas", "duckdb", "statsforecast"}),
            ),
            Table(
                FORECAST_MODELS,
                "One row per forecast series: grain, demand class, model and the parameters the library exposes.",
            ),
            Table(
                FORECAST_FITTED_VALUES, "In-sample one-step fitted values behind the residuals of MinT / WLS classes."
            ),
            Table(
                UPPER_LEVEL_FORECAST,
                "Forecasts of the levels above the parent (hierarchy.upper_levels): each node's own base forecast "
                "and the sums of the coherent parent forecasts below it (MinT / WLS reconcile the whole tree).",
            ),
        ),
        run=stage.run,
        settings=lambda part: forecast_settings(part),
        group="forecast",
        ins=(
            "lifecycle_history",
            "share_tables",
            "reinitialized_target",
            "cycle_calendar",
            "strategy_choice",
            "customer_spans",
            "products",
        ),
    )
)
