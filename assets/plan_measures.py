"""Asset `plan_measures`: every measure of the plan at leaf grain, each split by its own rule, pins kept."""

import dagster as dg
import pandas as pd

from assets.common import rule_check, schema_check_spec, table_metadata, validate
from pipelines.engines.children import active_children
from pipelines.engines.measure_split import find_pins_not_kept, find_sum_violations, plan_totals
from pipelines.partitions import cycle_class_partitions, partition_config
from pipelines.resources import PlanningConfigResource
from pipelines.schemas import PlanMeasures
from pipelines.stages.plan_measures import plan_measures as split_plan_measures
from pipelines.stages.plan_measures import share_basis_tables

PLAN_MEASURES = "plan_measures"
MEASURES_SUM_TO_PARENT = "measures_sum_to_parent"
PINS_KEPT = "pins_kept"
PINS_EXCEED_PARENT = "pins_exceed_parent"


@dg.asset(
    name=PLAN_MEASURES,
    group_name="plan",
    partitions_def=cycle_class_partitions,
    kinds={"pandas", "duckdb"},
    check_specs=[
        schema_check_spec(PLAN_MEASURES, PlanMeasures),
        dg.AssetCheckSpec(
            MEASURES_SUM_TO_PARENT,
            asset=PLAN_MEASURES,
            blocking=True,
            description="Proves that every measure reaches the leaf without losing or inventing anything: for even and "
            "pro_rata measures the customers of each product x site sum to its value in every period (pins counted; "
            "integer measures to the value rounded to the pack; 1e-9 relative), for replicate measures every unpinned "
            "customer holds the parent value and every active customer has a row. When it fails, the metadata lists the "
            "parent periods: 'no active child carries the value' means a value was entered where no customer is active "
            "(correct the adjustments row or the customer spans); any other reason is a defect of the split to report.",
        ),
        dg.AssetCheckSpec(
            PINS_KEPT,
            asset=PLAN_MEASURES,
            blocking=True,
            description="Proves that every pin of the pins input is the value of its customer, product, site, period and "
            "measure in the plan. When it fails, the metadata lists the pins with the reason: a pin on a customer that is "
            "not active in that period cannot be kept (correct the pin's period or customer, or its customer span).",
        ),
        dg.AssetCheckSpec(
            PINS_EXCEED_PARENT,
            asset=PLAN_MEASURES,
            blocking=False,
            description="Warns when pins take more than their parent holds (with pins.on_overflow: warn), listing the "
            "parent periods: the pins are kept, the other customers get 0, and the customers sum to the pins, not to the "
            "parent. When it fires (a warning, not a stop): lower the listed pins or raise the parent value if the parent "
            "should hold.",
        ),
    ],
    description="Every measure of the plan (config measures) at product x site x customer, one row per customer, period "
    "and measure: replicated, split evenly or pro rata by its basis (reinitialized target, a named share table or another "
    "measure), planner pins kept, optionally in whole units or packs (largest remainder method).",
)
def plan_measures(
    context: dg.AssetExecutionContext,
    planning: PlanningConfigResource,
    parent_forecast: pd.DataFrame,
    statistical_forecast: pd.DataFrame,
    reinitialized_target: pd.DataFrame,
    share_tables: pd.DataFrame,
    lifecycle_history: pd.DataFrame,
    products: pd.DataFrame,
    customer_spans: pd.DataFrame,
    adjustments: pd.DataFrame,
    pins: pd.DataFrame,
    cycle_calendar: pd.DataFrame,
):
    config = partition_config(context, planning.config)
    cycle = cycle_calendar.iloc[0]
    config.check_share_bases_fit(int(cycle["history_periods"]))
    cycle_date = pd.Timestamp(cycle["cycle_date"])
    bases = {}
    if config.share_bases:
        children = active_children(customer_spans, products, lifecycle_history, config, cycle_date)
        bases = share_basis_tables(lifecycle_history, children, products, config, cycle_date)
    result = split_plan_measures(
        share_tables, parent_forecast, statistical_forecast, reinitialized_target, adjustments, pins, config, cycle_date, bases
    )
    plan, check = validate(result.plan, PlanMeasures, PLAN_MEASURES)
    by_rule = plan.groupby(["measure", "rule", "basis", "fallback"]).size().rename("rows").reset_index()
    basis_fallbacks = pd.concat(
        [f.drop_duplicates(["product", "site"]).groupby("fallback").size().rename("parents").reset_index().assign(share_basis=n)
         for n, f in bases.items()],
        ignore_index=True,
    ) if bases else pd.DataFrame()
    yield dg.Output(
        plan,
        metadata=table_metadata(
            plan,
            measures=", ".join(config.measures),
            rows_by_measure_and_rule=by_rule,
            totals_parent_vs_leaf=plan_totals(plan, result.parents),
            pins_applied=len(result.pins_applied),
            pins_overflowing_parents=len(result.overflow),
            inputs_outside_horizon=len(result.unused_rows),
            share_basis_fallbacks=basis_fallbacks,
        ),
    )
    yield check
    yield rule_check(
        PLAN_MEASURES,
        MEASURES_SUM_TO_PARENT,
        find_sum_violations(plan, result.parents, config.measures),
        what="every even / pro_rata measure's customers sum to their parent in every period (pins counted), and every "
        "replicate measure's customers hold the parent value",
    )
    yield rule_check(
        PLAN_MEASURES,
        PINS_KEPT,
        find_pins_not_kept(plan, result.pins_applied, result.pins_not_applied),
        what="every pin is its leaf's value",
    )
    yield rule_check(
        PLAN_MEASURES,
        PINS_EXCEED_PARENT,
        result.overflow,
        what="no pins take more than their parent holds",
        severity=dg.AssetCheckSeverity.WARN,
    )
