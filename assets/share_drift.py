"""Asset `share_drift`: each child's share against the previous stored cycle's of its class."""

from assets.factory import Partition, StageAsset, Table, stage_asset
from pipelines.stages import share_drift as stage

SHARE_DRIFT = "share_drift"


def previous_share_table(part: Partition) -> dict:
    """The share table of the class's latest completed cycle before this one (None for its first cycle)."""
    previous, before = part.previous("share_tables")
    return {"previous": previous, "previous_cycle": before}


share_drift = stage_asset(StageAsset(
    tables=(Table(
        SHARE_DRIFT,
        "Each child's base share in this cycle and in the previous stored cycle of its class, biggest moves "
        "first (percentage points). Empty for a class's first cycle.",
    ),),
    run=stage.run,
    settings=lambda part: part.config.monitoring.max_share_drift_pp,
    group="shares",
    ins=("share_tables",),
    read=previous_share_table,
))
