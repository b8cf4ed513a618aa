"""Assets `backtest_accuracy`, `backtest_losses`, `share_tuning`: rolling-origin accuracy of every strategy at both
grains, their per-period losses, and every share window x method candidate's split accuracy with the choice."""

import dataclasses

from assets.factory import Partition, StageAsset, Table, stage_asset
from pipelines.stages import backtest_accuracy as stage

BACKTEST_ACCURACY = "backtest_accuracy"
BACKTEST_LOSSES = "backtest_losses"
SHARE_TUNING = "share_tuning"


def previous_tuning(part: Partition) -> dict:
    """The share_tuning of the class's latest completed cycle before this one (None for its first cycle)."""
    return {"previous_tuning": part.previous(SHARE_TUNING)[0]}


def backtest_settings(part: Partition) -> stage.BacktestSettings:
    """The backtest's settings; a shard's origins and residual windows start at its class's first period."""
    return dataclasses.replace(stage.BacktestSettings.of(part.config), class_window=part.shard is not None)


backtest_accuracy = stage_asset(StageAsset(
    tables=(
        Table(
            BACKTEST_ACCURACY,
            "Rolling-origin backtest per product class and seasonality: WMAPE, bias, MASE, RMSSE, value added over "
            "seasonal naive and prediction interval coverage of each strategy at leaf and parent grain, against raw "
            "actuals (value) and cleaned ones (value_cleaned), and the metric the class is judged by.",
            frozenset({"pandas", "duckdb", "statsforecast"}),
        ),
        Table(
            BACKTEST_LOSSES,
            "Leaf-grain loss of each class and strategy in every backtest period (origin x step): the inputs of "
            "the Diebold-Mariano test that keeps last cycle's strategy unless a challenger wins clearly.",
        ),
        Table(
            SHARE_TUNING,
            "Every share window x method candidate's leaf accuracy of the top-down split per class, the best and "
            "the choice the share tables follow (window: auto / method: auto), with its reason.",
        ),
    ),
    run=stage.run,
    settings=backtest_settings,
    group="forecast",
    ins=("lifecycle_history", "cleaned_history", "products", "customer_spans", "cycle_calendar"),
    read=previous_tuning,
))
