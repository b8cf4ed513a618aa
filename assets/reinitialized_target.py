"""Asset `reinitialized_target`: the target measure rewritten as the period's share x parent baseline."""

import dagster as dg
import pandas as pd

from assets.common import schema_check_spec, table_metadata, validate
from pipelines.partitions import cycle_class_partitions, partition_config
from pipelines.resources import PlanningConfigResource
from pipelines.schemas import ReinitializedTarget
from pipelines.stages.reinitialized_target import parents_with_mix_change, reinitialize_target

REINITIALIZED_TARGET = "reinitialized_target"


@dg.asset(
    name=REINITIALIZED_TARGET,
    group_name="shares",
    partitions_def=cycle_class_partitions,
    kinds={"pandas", "duckdb"},
    check_specs=[schema_check_spec(REINITIALIZED_TARGET, ReinitializedTarget)],
    description="Target measure at leaf grain for every horizon period: the period's share (base shares of the "
    "children active in it, renormalised) x the parent's baseline, so the next split follows fresh shares.",
)
def reinitialized_target(
    context: dg.AssetExecutionContext,
    planning: PlanningConfigResource,
    share_tables: pd.DataFrame,
    lifecycle_history: pd.DataFrame,
    products: pd.DataFrame,
    cycle_calendar: pd.DataFrame,
):
    config = partition_config(context, planning.config)
    cycle_date = pd.Timestamp(cycle_calendar["cycle_date"].iloc[0])
    frame = reinitialize_target(share_tables, lifecycle_history, config, cycle_date, products)
    target, check = validate(frame, ReinitializedTarget, REINITIALIZED_TARGET)
    first = target[target["period_start"] == target["period_start"].min()] if len(target) else target
    mix = parents_with_mix_change(target, share_tables)
    zero = target[target["zero_share_reason"].notna()].drop_duplicates(["product", "site", "period_start"])
    zero_by_reason = zero.groupby("zero_share_reason").size().rename("parent_periods").reset_index()
    yield dg.Output(
        target,
        metadata=table_metadata(
            target,
            horizon_periods=config.calendar.horizon,
            target_total_per_period=float(first["target"].sum()),
            parents_with_zero_baseline=int(first.loc[first["parent_baseline"] == 0, ["product", "site"]].drop_duplicates().shape[0]),
            parents_with_mix_change=mix,
            parents_with_mix_change_count=len(mix),
            zero_share_periods_by_reason=zero_by_reason,
            parent_periods_by_share_basis=target.drop_duplicates(["product", "site", "period_start"])["share_basis"].value_counts().rename_axis("share_basis").reset_index(),
        ),
    )
    yield check
