"""Asset `plan_measures`: every measure of the plan at leaf grain, each split by its own rule, pins kept."""

from assets.factory import StageAsset, Table, stage_asset
from pipelines.stages import plan_measures as stage

PLAN_MEASURES = "plan_measures"

plan_measures = stage_asset(
    StageAsset(
        tables=(
            Table(
                PLAN_MEASURES,
                "Every measure of the plan (config measures) at product x site x customer, one row per customer, "
                "period "
                "and measure: replicated, split evenly or pro rata by its basis (reinitialized target, a named "
                "share table or "
                "another measure), planner pins kept, optionally in whole units or packs (largest remainder method).",
            ),
        ),
        run=stage.run,
        settings=lambda part: stage.PlanSettings.of(part.config),
        group="plan",
        ins=(
            "parent_forecast",
            "statistical_forecast",
            "reinitialized_target",
            "share_tables",
            "lifecycle_history",
            "products",
            "customer_spans",
            "adjustments",
            "pins",
            "cycle_calendar",
        ),
    )
)
