"""Asset `share_tables`: this cycle's share of every active child in its parent."""

import dagster as dg
import pandas as pd

from assets.common import schema_check_spec, table_metadata, validate
from pipelines.resources import PlanningConfigResource
from pipelines.schemas import ShareTable
from pipelines.stages.lifecycle_history import active_children
from pipelines.stages.share_tables import compute_shares

SHARE_TABLES = "share_tables"


@dg.asset(
    name=SHARE_TABLES,
    group_name="shares",
    kinds={"pandas", "duckdb"},
    check_specs=[schema_check_spec(SHARE_TABLES, ShareTable)],
    description="Per product class: shares from the class's window and method, with the fallback used per parent.",
)
def share_tables(
    context: dg.AssetExecutionContext,
    planning: PlanningConfigResource,
    lifecycle_history: pd.DataFrame,
    products: pd.DataFrame,
    customer_spans: pd.DataFrame,
    cycle_calendar: pd.DataFrame,
):
    config = planning.config
    cycle = cycle_calendar.iloc[0]
    config.check_windows_fit(int(cycle["history_periods"]))
    cycle_date = pd.Timestamp(cycle["cycle_date"])
    children = active_children(customer_spans, products, cycle_date, config.calendar.period)
    shares, check = validate(compute_shares(lifecycle_history, children, config, cycle_date), ShareTable, SHARE_TABLES)
    parents = shares.drop_duplicates(["product", "site"])
    fallbacks = parents.groupby(["product_class", "fallback"]).size().rename("parents").reset_index()
    largest = shares.sort_values("share", ascending=False)[["product_class", "product", "site", "customer", "share", "window_used", "fallback"]]
    yield dg.Output(
        shares,
        metadata=table_metadata(
            shares,
            cycle_date=str(cycle_date.date()),
            parents=len(parents),
            children=len(shares),
            parents_with_fallback=int((parents["fallback"] != "none").sum()),
            fallbacks_by_class=fallbacks,
            largest_shares=largest,
        ),
    )
    yield check
