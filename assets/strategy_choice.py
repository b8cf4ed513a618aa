"""Asset `strategy_choice`: the strategy each class follows this cycle, with the decision and reason behind it."""

from assets.factory import Partition, StageAsset, Table, stage_asset
from pipelines.engines.backtest_combine import combine_accuracy, combine_losses
from pipelines.shards import needs_class_step
from pipelines.stages import strategy_choice as stage

STRATEGY_CHOICE = "strategy_choice"


def previous_choice(part: Partition) -> dict:
    """The strategy_choice of the class's latest completed cycle before this one (None for its first cycle)."""
    previous, before = part.previous(STRATEGY_CHOICE)
    return {"previous": previous, "previous_cycle": before}


def choice_inputs(part: Partition) -> dict:
    """The previous choice; for a class cut into shards that decides at class level, the backtest tables of every
    shard of this cycle combined into the class's (in place of the shard's own), so every shard stores the same
    class-level row (`pipelines.engines.backtest_combine`; a ShardsMissing error names a shard not run yet)."""
    found = previous_choice(part)
    if part.shard is None or not needs_class_step(part.full, part.product_class):
        return found
    accuracy = part.siblings("backtest_accuracy")
    losses = part.siblings("backtest_losses")
    return {**found, "backtest_accuracy": combine_accuracy(list(accuracy.values())),
            "backtest_losses": combine_losses(list(losses.values()))}


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
    read=choice_inputs,
))
