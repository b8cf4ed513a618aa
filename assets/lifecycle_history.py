"""Assets `lifecycle_history` and `lifecycle_audit`."""

from assets.factory import StageAsset, Table, stage_asset
from pipelines.stages import lifecycle_history as stage

LIFECYCLE_HISTORY = "lifecycle_history"
LIFECYCLE_AUDIT = "lifecycle_audit"

lifecycle_history = stage_asset(StageAsset(
    tables=(
        Table(
            LIFECYCLE_HISTORY,
            "History inside active spans, phased-out customers left out, retired products mapped to their "
            "successors, shortage periods flagged: the history the shares are computed from.",
        ),
        Table(LIFECYCLE_AUDIT, "What each lifecycle rule dropped or moved, per leaf."),
    ),
    run=stage.run,
    settings=lambda part: stage.LifecycleSettings.of(part.config),
    group="history",
    ins=("cleaned_history", "products", "customer_spans", "cycle_calendar"),
))
