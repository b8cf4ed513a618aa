"""Asset `period_basis`: the per-period weights of the per-period share methods, decided once a cycle."""

from assets.factory import StageAsset, Table, stage_asset
from pipelines.engines.share_settings import ShareSettings
from pipelines.stages import period_basis as stage

PERIOD_BASIS = "period_basis"

period_basis = stage_asset(StageAsset(
    tables=(Table(
        PERIOD_BASIS,
        "For classes whose share method gives a share per horizon period (seasonal, children_forecast): each "
        "child's weight in every horizon period and what it came from; read by reinitialized_target. Empty for "
        "classes with one share per child.",
    ),),
    run=stage.run,
    settings=lambda part: ShareSettings.of(part.config),
    group="shares",
    ins=("share_tables", "lifecycle_history", "cycle_calendar", "share_tuning"),
))
