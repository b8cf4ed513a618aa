"""Asset `share_drift`: each child's share against the previous cycle's, and the WARN check on big moves."""

from pathlib import Path

import dagster as dg
import pandas as pd

from assets.common import rule_check, schema_check_spec, table_metadata, validate
from assets.share_tables import SHARE_TABLES
from pipelines.partitions import cycle_class_partitions, partition_config, split_key
from pipelines.resources import PlanningConfigResource, previous_cycle, read_table
from pipelines.schemas import ShareDrift
from pipelines.stages.share_drift import drifted_beyond, share_drift as compute_drift

SHARE_DRIFT = "share_drift"
SHARE_DRIFT_WITHIN_LIMIT = "share_drift_within_limit"
DRIFT_CHECK_TEXT = (
    "Warns when a child's base share moved more than monitoring.max_share_drift_pp percentage points since the "
    "previous cycle of its class (a new or gone child counts from or to 0). When it fires, look at the listed "
    "children: a real change of mix (new contract, lost customer) is fine; otherwise inspect their history "
    "corrections and lifecycle spans before the split is used."
)


@dg.asset(
    name=SHARE_DRIFT,
    group_name="shares",
    partitions_def=cycle_class_partitions,
    kinds={"pandas", "duckdb"},
    check_specs=[
        schema_check_spec(SHARE_DRIFT, ShareDrift),
        dg.AssetCheckSpec(SHARE_DRIFT_WITHIN_LIMIT, asset=SHARE_DRIFT, blocking=False, description=DRIFT_CHECK_TEXT),
    ],
    description="Each child's base share in this cycle and in the previous stored cycle of its class, biggest moves "
    "first (percentage points). Empty for a class's first cycle.",
)
def share_drift(context: dg.AssetExecutionContext, planning: PlanningConfigResource, share_tables: pd.DataFrame):
    config = partition_config(context, planning.config)
    cycle, product_class = split_key(context.partition_key)
    store = Path(config.store.path)
    before = previous_cycle(store, SHARE_TABLES, cycle, product_class)
    # the class as it last completed in that cycle (its checks passed), published or not yet
    previous = read_table(store, SHARE_TABLES, cycle=before, product_class=product_class, versions="complete") if before else None
    drift, check = validate(compute_drift(share_tables, previous, before), ShareDrift, SHARE_DRIFT)
    threshold = config.monitoring.max_share_drift_pp
    moved = drifted_beyond(drift, threshold)
    yield dg.Output(
        drift,
        metadata=table_metadata(
            drift,
            previous_cycle=before or "none (first cycle of this class)",
            biggest_movers=drift.head(20),
            children_moved_beyond_threshold=len(moved),
            largest_move_pp=float(drift["abs_change_pp"].max()) if len(drift) else 0.0,
        ),
    )
    yield check
    yield rule_check(
        SHARE_DRIFT,
        SHARE_DRIFT_WITHIN_LIMIT,
        moved,
        what=DRIFT_CHECK_TEXT.split(". When")[0],
        severity=dg.AssetCheckSeverity.WARN,
        threshold_pp=f"{threshold:g}",
        previous_cycle=before or "none",
    )
