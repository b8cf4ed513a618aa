"""Asset `reinitialized_target`: the target measure rewritten as share x parent baseline."""

import dagster as dg
import pandas as pd

from assets.common import schema_check_spec, table_metadata, validate
from pipelines.resources import PlanningConfigResource
from pipelines.schemas import ReinitializedTarget
from pipelines.stages.reinitialized_target import reinitialize_target

REINITIALIZED_TARGET = "reinitialized_target"


@dg.asset(
    name=REINITIALIZED_TARGET,
    group_name="shares",
    kinds={"pandas", "duckdb"},
    check_specs=[schema_check_spec(REINITIALIZED_TARGET, ReinitializedTarget)],
    description="Target measure at leaf grain for the whole horizon: share x the parent's baseline, so the next split follows fresh shares.",
)
def reinitialized_target(
    context: dg.AssetExecutionContext,
    planning: PlanningConfigResource,
    share_tables: pd.DataFrame,
    lifecycle_history: pd.DataFrame,
    cycle_calendar: pd.DataFrame,
):
    config = planning.config
    cycle_date = pd.Timestamp(cycle_calendar["cycle_date"].iloc[0])
    target, check = validate(reinitialize_target(share_tables, lifecycle_history, config, cycle_date), ReinitializedTarget, REINITIALIZED_TARGET)
    first = target[target["period_start"] == target["period_start"].min()] if len(target) else target
    yield dg.Output(
        target,
        metadata=table_metadata(
            target,
            horizon_periods=config.calendar.horizon,
            target_total_per_period=float(first["target"].sum()),
            parents_with_zero_baseline=int(first.loc[first["parent_baseline"] == 0, ["product", "site"]].drop_duplicates().shape[0]),
        ),
    )
    yield check
