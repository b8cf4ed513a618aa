"""Asset `backtest_accuracy`: rolling-origin accuracy of every strategy at both grains."""

from assets.factory import StageAsset, Table, stage_asset
from pipelines.stages import backtest_accuracy as stage

BACKTEST_ACCURACY = "backtest_accuracy"

backtest_accuracy = stage_asset(StageAsset(
    tables=(Table(
        BACKTEST_ACCURACY,
        "Rolling-origin backtest per product class and seasonality: WMAPE, bias, MASE, value added over "
        "seasonal naive and prediction interval coverage of each strategy at leaf and parent grain.",
        frozenset({"pandas", "duckdb", "statsforecast"}),
    ),),
    run=stage.run,
    settings=lambda part: stage.BacktestSettings.of(part.config),
    group="forecast",
    ins=("lifecycle_history", "share_tables", "cycle_calendar", "products"),
))
