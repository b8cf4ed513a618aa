"""Asset `reconciliation` and the blocking checks that prove the cycle coherent."""

import dagster as dg
import pandas as pd

from assets.common import rule_check, schema_check_spec, table_metadata, validate
from pipelines.partitions import cycle_class_partitions
from pipelines.resources import PlanningConfigResource
from pipelines.schemas import Reconciliation
from pipelines.stages import reconciliation as rec

RECONCILIATION = "reconciliation"
CHILDREN_SUM_TO_PARENT = "children_sum_to_parent"
SHARES_SUM_TO_ONE = "shares_sum_to_one"
NO_VOLUME_AFTER_PHASE_OUT = "no_volume_after_phase_out"
NO_VOLUME_OUTSIDE_ACTIVE_SPAN = "no_volume_outside_active_span"
NO_NEGATIVE_FORECAST = "no_negative_forecast"
EVERY_ACTIVE_PARENT_HAS_CHILDREN = "every_active_parent_has_children"

CHECKS = {
    CHILDREN_SUM_TO_PARENT: "Proves the leaf forecast of every parent and period sums to the parent forecast within "
    f"{rec.RELATIVE_TOLERANCE:g} relative (one unit floor). When it fails, the listed parents were split wrongly: "
    "inspect their rows in statistical_forecast.",
    SHARES_SUM_TO_ONE: f"Proves the shares of every parent in every horizon period sum to 1 within {rec.SHARE_TOLERANCE:g}, "
    "or are all 0 with a recorded zero_share_reason. When it fails, the listed parent periods of reinitialized_target "
    "are inconsistent; rebuild share_tables and reinitialized_target.",
    NO_VOLUME_AFTER_PHASE_OUT: "Proves no customer gets forecast volume in a period after its span ends. When it fails, "
    "check the listed customers' active_to in customer_spans.",
    NO_VOLUME_OUTSIDE_ACTIVE_SPAN: "Proves no customer gets forecast volume before its span starts, and no product or "
    "customer outside the product's active span. When it fails, check active_from in customer_spans and the "
    "product's span in products for the listed rows.",
    NO_NEGATIVE_FORECAST: "Proves no parent or leaf forecast is negative. When it fails, look at the listed rows' model "
    "in parent_forecast and at planner inputs.",
    EVERY_ACTIVE_PARENT_HAS_CHILDREN: "Proves every forecast parent has at least one active child to carry its volume. "
    "When it fails, add customer spans for the listed product x site or retire the product.",
}


@dg.asset(
    name=RECONCILIATION,
    group_name="forecast",
    partitions_def=cycle_class_partitions,
    kinds={"pandas", "duckdb"},
    check_specs=[schema_check_spec(RECONCILIATION, Reconciliation)]
    + [dg.AssetCheckSpec(name, asset=RECONCILIATION, blocking=True, description=text) for name, text in CHECKS.items()],
    description="Per parent and period: parent forecast, sum of its children, difference; the checks prove the hierarchy coherent and the lifecycle respected.",
)
def reconciliation(
    context: dg.AssetExecutionContext,
    planning: PlanningConfigResource,
    parent_forecast: pd.DataFrame,
    statistical_forecast: pd.DataFrame,
    reinitialized_target: pd.DataFrame,
    customer_spans: pd.DataFrame,
    products: pd.DataFrame,
):
    period = planning.config.calendar.period  # the same in every partition
    table, check = validate(rec.reconcile(parent_forecast, statistical_forecast), Reconciliation, RECONCILIATION)
    worst = table.sort_values("relative_difference", ascending=False)
    yield dg.Output(
        table,
        metadata=table_metadata(
            table,
            largest_relative_difference=float(table["relative_difference"].max()) if len(table) else 0.0,
            worst_rows=worst,
        ),
    )
    yield check
    negatives = pd.concat(
        [rec.find_negative(parent_forecast).assign(grain="parent"), rec.find_negative(statistical_forecast).assign(grain="leaf")],
        ignore_index=True,
    )
    failing = {
        CHILDREN_SUM_TO_PARENT: rec.find_incoherent(table),
        SHARES_SUM_TO_ONE: rec.find_shares_not_summing_to_one(reinitialized_target),
        NO_VOLUME_AFTER_PHASE_OUT: rec.find_volume_after_phase_out(statistical_forecast, customer_spans, period),
        NO_VOLUME_OUTSIDE_ACTIVE_SPAN: rec.find_volume_outside_active_span(
            parent_forecast, statistical_forecast, customer_spans, products, period
        ),
        NO_NEGATIVE_FORECAST: negatives,
        EVERY_ACTIVE_PARENT_HAS_CHILDREN: rec.find_parents_without_children(table),
    }
    for name, rows in failing.items():
        yield rule_check(RECONCILIATION, name, rows, what=CHECKS[name].split(". When")[0])
