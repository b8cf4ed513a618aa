"""Asset `share_tables`: this cycle's base share and lifecycle rule of every child in its parent."""

from assets.factory import StageAsset, Table, stage_asset
from pipelines.stages import share_tables as stage

SHARE_TABLES = "share_tables"

share_tables = stage_asset(StageAsset(
    tables=(Table(
        SHARE_TABLES,
        "Per product class: each child's base share from the class's window and method, the fallback used "
        "per parent, and the lifecycle rule that sets its share over the horizon.",
    ),),
    run=stage.run,
    settings=lambda part: stage.ShareTableSettings.of(part.config),
    group="shares",
    ins=("lifecycle_history", "products", "customer_spans", "cycle_calendar", "share_tuning"),
))
