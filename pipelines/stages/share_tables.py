"""Stage 4, `share_tables`: each child's base share of its parent, and its lifecycle rule.

The parent is product x site; its children are the customer spans active in
any period of the horizon (`pipelines.engines.children.active_children`). The
share engine computes the table, one row per child: the history share over
the established children from the class's window and method, with the
fallback windows (`pipelines.engines.shares`, where the methods and their
sources are stated), then the new-customer rules and the base share
(`pipelines.engines.lifecycle_shares`). The per-period methods' weights per
horizon period are the next stage, `period_basis`; the shares per horizon
period are `reinitialized_target`'s.

This stage first checks that each class window fits the history (a window
longer than the history is a config error naming the key), and judges the
table: new customers without a share (`new_customers_have_share`) and too
many parents on a fallback (`fallback_share_within_limit`), both WARN.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

from pipelines.checks import FALLBACK_SHARE_WITHIN_LIMIT, NEW_CUSTOMERS_HAVE_SHARE
from pipelines.config import PlanningConfig, check_windows_fit
from pipelines.engines.children import active_children
from pipelines.engines.lifecycle_shares import find_new_customers_without_share, new_customers
from pipelines.engines.share_settings import ShareSettings
from pipelines.engines.share_tuning import chosen_rules
from pipelines.engines.shares import compute_shares, history_rows
from pipelines.keys import PARENT_ID, coded, first_rows
from pipelines.results import CheckRows, Log, StageResult, quiet
from pipelines.schemas import LIFECYCLE_RULES


@dataclass(frozen=True)
class ShareTableSettings:
    """The share engine's settings, the class windows that must fit the history, the fallback limit."""

    share: ShareSettings
    windows: Mapping[str, int] = field(default_factory=dict)
    max_fallback_share: float = 0.10
    source: Path = Path("<memory>")

    @classmethod
    def of(cls, config: PlanningConfig) -> ShareTableSettings:
        return cls(
            ShareSettings.of(config), config.class_windows(), config.monitoring.max_fallback_share, config.source
        )


def run(
    lifecycle_history: pd.DataFrame,
    products: pd.DataFrame,
    customer_spans: pd.DataFrame,
    cycle_calendar: pd.DataFrame,
    settings: ShareTableSettings,
    log: Log = quiet,
    share_tuning: pd.DataFrame | None = None,
) -> StageResult:
    """The share table of the active children, its figures and its two WARN checks.

    share_tuning: the backtest's choice of window and method for the classes with `window: auto` or
    `method: auto` (pipelines.engines.share_tuning); the configured ones for the others.
    """
    settings = dataclasses.replace(settings, share=chosen_rules(share_tuning, settings.share))
    cycle = cycle_calendar.iloc[0]
    check_windows_fit(settings.windows, int(cycle["history_periods"]), settings.source)
    cycle_date = pd.Timestamp(cycle["cycle_date"])
    keys = coded(lifecycle_history)  # the history's ids and keys, coded once for the children and the shares
    rows = history_rows(lifecycle_history, keys, settings.share, cycle_date)  # and its periods, once
    children = active_children(customer_spans, products, lifecycle_history, settings.share, cycle_date, keys, rows)
    shares = compute_shares(lifecycle_history, children, settings.share, cycle_date, keys=keys, rows=rows)
    parents = shares.iloc[first_rows(shares[PARENT_ID].to_numpy())]  # drop_duplicates by key: one id per key
    used = parents[parents["fallback"] != "none"]
    fraction = len(used) / len(parents) if len(parents) else 0.0
    limit = settings.max_fallback_share
    columns = ["product_class", "product", "site", "customer", "share", "window_used", "fallback"]
    by_rule = shares["lifecycle_rule"].value_counts().reindex(list(LIFECYCLE_RULES), fill_value=0).rename("children")
    new = new_customers(shares)
    figures = {
        "cycle_date": str(cycle_date.date()),
        "parents": len(parents),
        "children": len(shares),
        "parents_with_fallback": int((parents["fallback"] != "none").sum()),
        "fallbacks_by_class": parents.groupby(["product_class", "fallback"]).size().rename("parents").reset_index(),
        "largest_shares": shares.sort_values("share", ascending=False)[columns],
        "children_by_lifecycle_rule": by_rule.rename_axis("lifecycle_rule").reset_index(),
        "new_customers": new,
        "new_customer_count": len(new),
    }
    fallback_rows = used[["product_class", "product", "site", "fallback", "window", "window_used"]]
    return StageResult(
        outputs={"share_tables": shares},
        metadata={"share_tables": figures},
        checks={
            NEW_CUSTOMERS_HAVE_SHARE: CheckRows(find_new_customers_without_share(shares)),
            FALLBACK_SHARE_WITHIN_LIMIT: CheckRows(
                fallback_rows if fraction > limit else used.iloc[0:0],
                {"parents_with_fallback": f"{len(used)} of {len(parents)} ({fraction:.1%}; limit {limit:.1%})"},
            ),
        },
    )
