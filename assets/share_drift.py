"""Asset `share_drift`: each child's share against the previous stored cycle's of its class."""

from pathlib import Path

from assets.factory import Partition, StageAsset, Table, stage_asset
from pipelines.resources import previous_cycle, read_table
from pipelines.stages import share_drift as stage

SHARE_DRIFT = "share_drift"


def previous_share_table(part: Partition) -> dict:
    """The share table of the class's latest completed cycle before this one (None for its first cycle)."""
    store = Path(part.config.store.path)
    before = previous_cycle(store, "share_tables", part.cycle, part.product_class)
    # the class as it last completed in that cycle (its blocking checks passed), published or not yet
    previous = (
        read_table(store, "share_tables", cycle=before, product_class=part.product_class, versions="complete")
        if before
        else None
    )
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
