"""Asset `strategy_choice`: the strategy each class follows this cycle, with the backtest margin behind it."""

from assets.factory import StageAsset, Table, stage_asset
from pipelines.stages import strategy_choice as stage

STRATEGY_CHOICE = "strategy_choice"

strategy_choice = stage_asset(StageAsset(
    tables=(Table(
        STRATEGY_CHOICE,
        "Per product class: the strategy the cycle follows (the backtest's winner for auto, else the configured "
        "one), its leaf-grain WMAPE, the runner-up and the margin; the forecast, summary, report and explain read it.",
    ),),
    run=stage.run,
    settings=lambda part: stage.StrategySettings.of(part.config),
    group="forecast",
    ins=("backtest_accuracy",),
))
