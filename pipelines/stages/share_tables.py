"""Stage 4, `share_tables`: each child's base share of its parent, and its lifecycle rule.

The share engine (`pipelines.engines.shares`, `pipelines.engines.lifecycle_shares`)
computes the table; this stage checks the class windows fit the history, finds
the active children and judges the table (new customers without a share, too
many fallbacks).

The parent is product x site; its children are the customer spans active in
any period of the horizon (`engines.children.active_children`). The share
table has one row per child; the shares per horizon period are derived from it
in `reinitialized_target` (`split_shares` below does both, `period_basis`
gives the per-period methods their weight in each period).

**History share.** Computed over the *established* children (at least
`lifecycle.min_history_periods` distinct periods of own history) from the
`window` periods before the cycle date, per product class. Share methods
(Gross & Sohl 1990; Hyndman & Athanasopoulos, FPP 3rd ed., section 11.3):

- `pooled` (proportion of historical averages):
  p_j = sum_t y_{j,t} / sum_t Y_t, with Y_t = sum_j y_{j,t}.
- `mean_of_ratios` (average of historical proportions):
  p_j = (1 / |T+|) sum_{t in T+} y_{j,t} / Y_t, where T+ are the window's
  periods with Y_t > 0. A period with no parent volume has no proportion to
  average, so it is left out (the rule for a zero denominator).
- `smoothed` (exponentially weighted proportions; Brown 1962, exponential
  smoothing applied to the vector of proportions): over the window's periods,
  oldest first, p_j starts at the proportion y_{j,t}/Y_t of the first period
  with Y_t > 0 and is then updated by
  p_{j,t} = alpha x y_{j,t} / Y_t + (1 - alpha) x p_{j,t-1}
  (alpha = the class's `smoothing`). A period with no parent volume (or a
  shortage) leaves p unchanged. Each update is a convex combination of two
  probability vectors, so p stays one. The start value weighs (1 - alpha)^(n-1)
  after n periods with volume: a window of a few times 1 / alpha makes it
  negligible (alpha 0.2 over 26 weeks: 0.4%).

Two methods give the established children a share per horizon period, their
*per-period basis* (`period_basis`); the share table holds their pooled share
over the window (above, with the same fallbacks) as `history_share`, which is
both their one-row summary and their fallback in any period without a basis:

- `seasonal` (shares by period of the year): the share of child j in horizon
  period h is the pooled share over the history periods with h's period of the
  year, taken from the `seasonal_years` (default 3) most recent occurrences of
  each period of the year before the cycle date. Period of the year: the ISO
  week number for weeks, with week 53 counted as week 52 (a long year's last
  two weeks pool as one period of the year, and a horizon week 53 reads week
  52's history), or the month for months. `seasonal_band` k > 0 pools the k
  neighbouring periods of the year on each side too, each from its own most
  recent occurrences (wrapping round the year: week 1's neighbours include
  week 52), damping noise at the cost of a flatter season. Shortage periods are
  left out (see below). A parent without volume in the pooled periods of h's period of the
  year falls back to its pooled share in h.
- `forecast_proportions` (Athanasopoulos, Ahmed & Hyndman 2009): the
  children's own base forecasts, from the models the class uses (the forecast
  stage's `base_forecasts` run at leaf grain on the children's lifecycle
  history before the cycle date, shortage periods included as the forecast
  stage has them, negatives set to 0): share_{j,h} =
  yhat_{j,h} / sum_k yhat_{k,h} over the parent's established children. Where
  they are all 0 in a period, the pooled share is the basis there.

Where a per-period method fell back is recorded per parent and period in the
`share_basis` column of `reinitialized_target` (`pooled_fallback`). The
per-period basis is computed there, from the same lifecycle history, rather
than stored here: a second output table would make share_tables a multi-asset,
which Dagster will not rematerialize when only `share_tables` is selected
(`make rebuild ASSET=share_tables`).

A parent period with a recorded supply shortage (any of its rows has
`shortage = True`) is left out of the window entirely, for every child, so a
stock-out does not move share between customers.

Fallback, recorded per parent: when the parent has no volume in its window,
each of the class's `fallback_windows` is tried in turn (`longer_window`);
when none has volume, the established children share evenly (`even`).

**New customers** (fewer own periods than `min_history_periods`; their own
short history is left out of the history shares above, though it stays in the
parent's baseline and forecast):

- `reference`: with a `reference_customer` that is an established child of the
  same parent, the new customer's share is scale x the reference's history
  share, *taken from* the reference, whose share drops by that amount. The
  scale is the span's `scale`, else config `lifecycle.reference_scale`
  (default 0.5: new customer and reference split the reference's share evenly;
  1 = like-for-like replacement). When several new customers take more than a
  reference has (scales summing above 1), their takes are scaled down to
  exactly the reference's share.
- `initial_share`: otherwise, with a planner-given `initial_share` s, the new
  customer gets s and the other children are scaled by (1 - S), S the sum of
  the initial shares active in the period (above 1, the initial shares are
  renormalised to sum to 1 and the others get 0).
- `awaiting_history`: with neither, no share until the customer has
  `min_history_periods` periods of history; the asset lists such customers in
  a WARN check (`new_customer_without_share`).

Established children are labelled `phase_in` (first active period after the
cycle date), `phase_out` (last active period before the horizon ends) or
`none`.

**Base share vs period share.** In horizon period h only the children active
in h hold weight: w_j = p_j (p_{j,h} for a per-period method) for an
established child (less what new customers
active in h take from it), w_n = take_n for a reference-rule new customer. The
period's shares are (1 - min(S_h, 1)) x w_j / sum_k w_k for those, and the
initial shares (renormalised when S_h > 1) for the initial-share customers.
They sum to 1, or are all 0 when no active child holds any weight (the reason
is recorded per period in `reinitialized_target`). The share table's `share`
is this rule with every child active: the base share (for a per-period method,
from its pooled summary). When a child is
inactive its weight leaves the sum and the others are renormalised, so a
reference keeps its whole share until its new customer starts, and a new
customer replacing a reference that ends (scale 1) takes exactly its share.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

from pipelines.checks import FALLBACK_SHARE_WITHIN_LIMIT, NEW_CUSTOMERS_HAVE_SHARE
from pipelines.config import PlanningConfig, check_windows_fit
from pipelines.engines.children import active_children
from pipelines.engines.lifecycle_shares import find_new_customers_without_share, new_customers
from pipelines.engines.share_settings import ShareSettings
from pipelines.engines.shares import compute_shares
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
) -> StageResult:
    """The share table of the active children, its figures and its two WARN checks."""
    cycle = cycle_calendar.iloc[0]
    check_windows_fit(settings.windows, int(cycle["history_periods"]), settings.source)
    cycle_date = pd.Timestamp(cycle["cycle_date"])
    children = active_children(customer_spans, products, lifecycle_history, settings.share, cycle_date)
    shares = compute_shares(lifecycle_history, children, settings.share, cycle_date)
    parents = shares.drop_duplicates(["product", "site"])
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
