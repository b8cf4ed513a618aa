"""Asset `strategy_choice`: the strategy each class follows this cycle, with the decision and reason behind it."""

from assets.factory import Partition, StageAsset, Table, stage_asset
from pipelines.stages import strategy_choice as stage

STRATEGY_CHOICE = "strategy_choice"


def previous_choice(part: Partition) -> dict:
    """The strategy_choice of the class's latest completed cycle before this one (None for its first cycle)."""
    previous, before = part.previous(STRATEGY_CHOICE)
    return {"previous": previous, "previous_cycle": before}


strategy_choice = stage_asset(StageAsset(
    tables=(Table(
        STRATEGY_CHOICE,
        "Per product class: the strategy the cycle follows (for auto, last cycle's unless this cycle's best wins "
        "by more than the tolerance or by the DM-HLN test; else the configured one), the decision and its reason, "
        "its leaf-grain WMAPE and RMSSE, the runner-up and the margin; the forecast, summary, report and explain "
        "read it.",
    ),),
    run=stage.run,
    settings=lambda part: stage.StrategySettings.of(part.config),
    group="forecast",
    ins=("backtest_accuracy", "backtest_losses"),
    read=previous_choice,
))
