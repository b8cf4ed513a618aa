"""Assets `lifecycle_history` and `lifecycle_audit`."""

import dagster as dg
import pandas as pd

from assets.common import schema_check_spec, table_metadata, validate
from pipelines.partitions import cycle_class_partitions, partition_config
from pipelines.resources import PlanningConfigResource
from pipelines.schemas import LifecycleAudit, LifecycleHistory
from pipelines.stages.lifecycle_history import apply_lifecycle

LIFECYCLE_HISTORY = "lifecycle_history"
LIFECYCLE_AUDIT = "lifecycle_audit"


@dg.multi_asset(
    group_name="history",
    partitions_def=cycle_class_partitions,
    outs={
        LIFECYCLE_HISTORY: dg.AssetOut(kinds={"pandas", "duckdb"}, description="History inside active spans, phased-out customers left out, retired products mapped to their successors, shortage periods flagged: the share basis."),
        LIFECYCLE_AUDIT: dg.AssetOut(kinds={"pandas", "duckdb"}, description="What each lifecycle rule dropped or moved, per leaf."),
    },
    check_specs=[schema_check_spec(LIFECYCLE_HISTORY, LifecycleHistory), schema_check_spec(LIFECYCLE_AUDIT, LifecycleAudit)],
    can_subset=False,
)
def lifecycle_history(
    context: dg.AssetExecutionContext,
    planning: PlanningConfigResource,
    cleaned_history: pd.DataFrame,
    products: pd.DataFrame,
    customer_spans: pd.DataFrame,
    cycle_calendar: pd.DataFrame,
):
    config = partition_config(context, planning.config)
    cycle_date = pd.Timestamp(cycle_calendar["cycle_date"].iloc[0])
    result = apply_lifecycle(cleaned_history, products, customer_spans, config, cycle_date)
    history, history_check = validate(result.history, LifecycleHistory, LIFECYCLE_HISTORY)
    audit, audit_check = validate(result.audit, LifecycleAudit, LIFECYCLE_AUDIT)
    by_rule = audit.groupby("rule").agg(leaves=("customer", "size"), periods=("periods", "sum"), quantity=("quantity", "sum")).reset_index()
    by_origin = history.groupby("origin").agg(rows=("quantity", "size"), quantity=("quantity", "sum")).reset_index()
    yield dg.Output(
        history,
        output_name=LIFECYCLE_HISTORY,
        metadata=table_metadata(history, by_origin=by_origin, shortage_rows=int(history["shortage"].sum())),
    )
    yield dg.Output(audit, output_name=LIFECYCLE_AUDIT, metadata=table_metadata(audit, by_rule=by_rule))
    yield from (history_check, audit_check)
