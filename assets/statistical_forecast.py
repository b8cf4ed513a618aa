"""Assets `parent_forecast`, `statistical_forecast`, `forecast_models`, `forecast_fitted_values`,
`upper_level_forecast`: the forecast rerun."""

from assets.factory import StageAsset, Table, stage_asset
from pipelines.stages import statistical_forecast as stage

PARENT_FORECAST = "parent_forecast"
STATISTICAL_FORECAST = "statistical_forecast"
FORECAST_MODELS = "forecast_models"
FORECAST_FITTED_VALUES = "forecast_fitted_values"
UPPER_LEVEL_FORECAST = "upper_level_forecast"

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
        settings=lambda part: stage.ForecastSettings.of(part.config),
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
