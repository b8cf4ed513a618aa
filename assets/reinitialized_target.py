"""Asset `reinitialized_target`: the target measure rewritten as the period's share x parent baseline."""

from assets.factory import StageAsset, Table, stage_asset
from pipelines.engines.share_settings import ShareSettings
from pipelines.stages import reinitialized_target as stage

REINITIALIZED_TARGET = "reinitialized_target"

reinitialized_target = stage_asset(StageAsset(
    tables=(Table(
        REINITIALIZED_TARGET,
        "Target measure at leaf grain for every horizon period: the period's share (base shares of the "
        "children active in it, renormalised) x the parent's baseline, so the next split follows fresh shares.",
    ),),
    run=stage.run,
    settings=lambda part: ShareSettings.of(part.config),
    group="shares",
    ins=("share_tables", "period_basis", "lifecycle_history", "products", "cycle_calendar", "share_tuning"),
))
