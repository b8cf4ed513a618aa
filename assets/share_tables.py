"""Asset `share_tables`: this cycle's base share and lifecycle rule of every child in its parent."""

import dagster as dg
import pandas as pd

from assets.common import rule_check, schema_check_spec, table_metadata, validate
from pipelines.engines.children import active_children
from pipelines.engines.shares import compute_shares, find_new_customers_without_share, new_customers
from pipelines.partitions import cycle_class_partitions, partition_config
from pipelines.resources import PlanningConfigResource
from pipelines.schemas import SHARE_RULES, ShareTable

SHARE_TABLES = "share_tables"
NEW_CUSTOMER_WITHOUT_SHARE = "new_customer_without_share"
FALLBACK_SHARE_WITHIN_LIMIT = "fallback_share_within_limit"
FALLBACK_CHECK_TEXT = (
    "Warns when more than monitoring.max_fallback_share of the class's parents took their shares from a fallback "
    "(a longer window, or an even split when no window had volume), listing those parents. When it fires, the "
    "class's window is too short for its history: lengthen product_classes.<class>.window, or check that the "
    "parents' history arrived."
)


@dg.asset(
    name=SHARE_TABLES,
    group_name="shares",
    partitions_def=cycle_class_partitions,
    kinds={"pandas", "duckdb"},
    check_specs=[
        schema_check_spec(SHARE_TABLES, ShareTable),
        dg.AssetCheckSpec(
            NEW_CUSTOMER_WITHOUT_SHARE,
            asset=SHARE_TABLES,
            blocking=False,
            description="Warns when a new customer (fewer periods of own history than lifecycle.min_history_periods) "
            "has neither a reference_customer nor an initial_share, so it gets no share until it has that much "
            "history; the rows list them. When it fires (a warning, not a stop): give the listed spans a "
            "reference_customer or an initial_share in customer_spans if their volume should be planned now.",
        ),
        dg.AssetCheckSpec(FALLBACK_SHARE_WITHIN_LIMIT, asset=SHARE_TABLES, blocking=False, description=FALLBACK_CHECK_TEXT),
    ],
    description="Per product class: each child's base share from the class's window and method, the fallback used "
    "per parent, and the lifecycle rule that sets its share over the horizon.",
)
def share_tables(
    context: dg.AssetExecutionContext,
    planning: PlanningConfigResource,
    lifecycle_history: pd.DataFrame,
    products: pd.DataFrame,
    customer_spans: pd.DataFrame,
    cycle_calendar: pd.DataFrame,
):
    config = partition_config(context, planning.config)
    cycle = cycle_calendar.iloc[0]
    config.check_windows_fit(int(cycle["history_periods"]))
    cycle_date = pd.Timestamp(cycle["cycle_date"])
    children = active_children(customer_spans, products, lifecycle_history, config, cycle_date)
    shares, check = validate(compute_shares(lifecycle_history, children, config, cycle_date), ShareTable, SHARE_TABLES)
    parents = shares.drop_duplicates(["product", "site"])
    fallbacks = parents.groupby(["product_class", "fallback"]).size().rename("parents").reset_index()
    largest = shares.sort_values("share", ascending=False)[["product_class", "product", "site", "customer", "share", "window_used", "fallback"]]
    by_rule = shares["lifecycle_rule"].value_counts().reindex(list(SHARE_RULES), fill_value=0).rename("children")
    new = new_customers(shares)
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
            children_by_lifecycle_rule=by_rule.rename_axis("lifecycle_rule").reset_index(),
            new_customers=new,
            new_customer_count=len(new),
        ),
    )
    yield check
    yield rule_check(
        SHARE_TABLES,
        NEW_CUSTOMER_WITHOUT_SHARE,
        find_new_customers_without_share(shares),
        what="every new customer has a share from a reference customer or an initial share",
        severity=dg.AssetCheckSeverity.WARN,
    )
    limit = config.monitoring.max_fallback_share
    used = parents[parents["fallback"] != "none"]
    fraction = len(used) / len(parents) if len(parents) else 0.0
    yield rule_check(
        SHARE_TABLES,
        FALLBACK_SHARE_WITHIN_LIMIT,
        used[["product_class", "product", "site", "fallback", "window", "window_used"]] if fraction > limit else used.iloc[0:0],
        what=FALLBACK_CHECK_TEXT.split(". When")[0],
        severity=dg.AssetCheckSeverity.WARN,
        parents_with_fallback=f"{len(used)} of {len(parents)} ({fraction:.1%}; limit {limit:.1%})",
    )
