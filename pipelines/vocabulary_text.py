"""The project's words in sentences: what each member of `pipelines.vocabulary` means, for `explain`, the report
and the docs (tests/test_vocabulary.py checks that every member has its sentence)."""

from __future__ import annotations

from pipelines.vocabulary import Basis, LifecycleRule, ShareMethod, Strategy, ZeroReason

SHARE_METHOD_TEXT = {
    ShareMethod.POOLED: "pooled: the customer's volume over the window / the parent's volume over the window",
    ShareMethod.MEAN_OF_RATIOS: "mean_of_ratios: the mean, over the window's periods with parent volume, of the "
    "customer's quantity / the parent's quantity",
    ShareMethod.SMOOTHED: "smoothed: the customer's quantity / the parent's quantity in each period of the window, "
    "exponentially smoothed from the oldest period on (Brown 1962; alpha = the class's smoothing)",
    ShareMethod.SEASONAL: "seasonal: the customer's volume / the parent's volume in the same period of the year "
    "over the last seasonal_years years, one share per horizon period (the pooled share in a period without volume)",
    ShareMethod.CHILDREN_FORECAST: "children_forecast: the customers' own forecasts in each horizon period, in "
    "proportion (forecast proportions; the pooled share in a period where they are all 0)",
}
LIFECYCLE_RULE_TEXT = {
    LifecycleRule.NONE: "none: an established customer active over the whole horizon, share from history",
    LifecycleRule.PHASE_IN: "phase_in: an established customer whose span starts inside the horizon; no share before "
    "it starts",
    LifecycleRule.PHASE_OUT: "phase_out: an established customer whose span ends inside the horizon; no share after "
    "it ends",
    LifecycleRule.REFERENCE: "reference: a new customer taking scale x its reference customer's history share, taken "
    "from the reference",
    LifecycleRule.INITIAL_SHARE: "initial_share: a new customer with a planner-given share; the other customers are "
    "scaled by 1 minus it",
    LifecycleRule.AWAITING_HISTORY: "awaiting_history: a new customer with neither reference customer nor initial "
    "share; no share until it has enough own history",
}
ZERO_REASON_TEXT = {
    ZeroReason.PRODUCT_NOT_ACTIVE: "the product's own span does not cover this period",
    ZeroReason.NO_ACTIVE_CHILD: "no customer span of the parent covers this period",
    ZeroReason.AWAITING_HISTORY: "the only active customers are new customers still awaiting history",
    ZeroReason.NO_SHARE_AMONG_ACTIVE: "the active customers hold no share",
}
FORECAST_BASIS_TEXT = {
    Basis.REINITIALIZED_TARGET: "top-down split of the parent forecast by the reinitialized target",
    Basis.PERIOD_SHARE: "split of the parent forecast by the period shares, as the parent's targets were all 0 "
    "(baseline 0)",
    Basis.LEAF_FORECAST: "the customer's own forecast, bottom-up: the parent is the sum of its customers",
    Basis.CHILDREN_FORECAST: "the parent forecast split in proportion to the customers' own forecasts",
    Basis.RECONCILED: "parent and customer forecasts reconciled by MinT / WLS",
}
STRATEGY_TEXT = {
    Strategy.TOP_DOWN: "top_down: the parent forecast split by the reinitialized target",
    Strategy.FORECAST_PROPORTIONS: "forecast_proportions: the parent forecast split by the customers' own forecasts",
    Strategy.BOTTOM_UP: "bottom_up: every customer forecast on its own, the parent their sum",
    Strategy.MINT_SHRINK: "mint_shrink: both grains reconciled by MinT with a shrunk residual covariance",
    Strategy.WLS_VAR: "wls_var: both grains reconciled by weighted least squares on the residual variances",
}
