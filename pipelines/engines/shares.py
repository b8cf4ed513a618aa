"""The share engine: each child's history share of its parent, its lifecycle rule, and the shares in a period.

The parent is product x site; its children are the customer spans active in
any period of the horizon (`pipelines.engines.children.active_children`). The
engine reads a small `ShareSettings`: the calendar's period and horizon, the
lifecycle thresholds, whether shortage periods are left out, and one
`ShareRule` (window, method, fallback windows and the method's keys) per
product class, so a named share basis runs it with its own rule in place of
the classes' (`plan_measures`).

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

The per-period methods (`seasonal`, `forecast_proportions`) give the
established children a share per horizon period, their *period basis*
(`pipelines.engines.period_shares`); the share table holds their pooled share
over the window (above, with the same fallbacks) as `history_share`, which is
both their one-row summary and their fallback in any period without a basis.

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
  a WARN check (`new_customers_have_share`).

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
from dataclasses import dataclass, field, replace

import numpy as np
import pandas as pd

from pipelines.calendar import horizon_starts, ordinal_to_start, period_ordinal
from pipelines.config_sections import DEFAULT_SEASONAL_YEARS
from pipelines.engines.models import ModelSettings
from pipelines.keys import LEAF, PARENT, factorize, lookup
from pipelines.vocabulary import NEW_CUSTOMER_RULES, ShortageRule


@dataclass(frozen=True)
class ShareRule:
    """How one product class (or one named share basis) computes history shares."""

    window: int
    method: str = "pooled"
    fallback_windows: tuple[int, ...] = ()
    smoothing: float | None = None
    years: int = DEFAULT_SEASONAL_YEARS
    band: int = 0

    @classmethod
    def of(cls, section) -> ShareRule:
        """From a `ProductClassConfig` or a `ShareBasisConfig`."""
        return cls(
            window=section.window,
            method=section.method,
            fallback_windows=tuple(section.fallback_windows),
            smoothing=getattr(section, "smoothing", None),
            years=getattr(section, "years", DEFAULT_SEASONAL_YEARS),
            band=getattr(section, "band", 0),
        )


@dataclass(frozen=True)
class ShareSettings:
    """What the share engine reads: calendar, lifecycle thresholds, shortage rule, a rule per product class."""

    period: str
    horizon: int
    min_history_periods: int
    reference_scale: float
    exclude_shortages: bool
    rules: Mapping[str, ShareRule]
    # the per-period method `forecast_proportions` forecasts the children with their class's models
    models: ModelSettings = field(default_factory=lambda: ModelSettings(period="week", choices={}))

    @classmethod
    def of(cls, config) -> ShareSettings:
        """From a planning config (every class it holds); a ShareSettings is returned as it is."""
        if isinstance(config, ShareSettings):
            return config
        return cls(
            period=config.calendar.period,
            horizon=config.calendar.horizon,
            min_history_periods=config.lifecycle.min_history_periods,
            reference_scale=config.lifecycle.reference_scale,
            exclude_shortages=config.cleansing.shortages == ShortageRule.EXCLUDE,
            rules={name: ShareRule.of(pc) for name, pc in config.product_classes.items()},
            models=ModelSettings.of(config),
        )

    def with_rule(self, rule: ShareRule) -> ShareSettings:
        """The same settings with `rule` in place of every class's own (a named share basis)."""
        return replace(self, rules={name: rule for name in self.rules})


SHARE_COLUMNS = LEAF + [
    "cycle_date",
    "product_class",
    "share",
    "history_share",
    "method",
    "window",
    "window_used",
    "window_start",
    "fallback",
    "child_volume",
    "parent_volume",
    "lifecycle_rule",
    "first_active_period",
    "last_active_period",
    "own_periods",
    "reference_customer",
    "scale",
    "initial_share",
    "lifecycle_detail",
]




def window_volumes(age: np.ndarray, qty: np.ndarray, child: np.ndarray, n_children: int, window: int) -> np.ndarray:
    """Volume of each child over the last `window` periods (age 1 = the period before the cycle)."""
    inside = (age >= 1) & (age <= window)
    return np.bincount(child[inside], weights=qty[inside], minlength=n_children)


def period_proportions(
    age: np.ndarray, qty: np.ndarray, child: np.ndarray, parent_of_child: np.ndarray, n_parents: int, window: int
) -> tuple[np.ndarray, np.ndarray]:
    """(ratio (n, window), has_volume (n, window)): y_{j,t} / Y_t of every child and window period.

    Column a - 1 holds age a (column 0 = the period before the cycle). Y_t is the
    volume of the child's parent over the rows given; where Y_t = 0 the ratio is 0
    and has_volume is False.
    """
    n_children = len(parent_of_child)
    inside = (age >= 1) & (age <= window)
    c, a, q = child[inside], age[inside], qty[inside]
    # child volume per (child, period) and parent volume per (parent, period)
    child_cell = c * window + (a - 1)
    child_t = np.bincount(child_cell, weights=q, minlength=n_children * window).reshape(n_children, window)
    parent_t = np.zeros((n_parents, window))
    np.add.at(parent_t, parent_of_child, child_t)
    denominator = parent_t[parent_of_child]
    has_volume = denominator > 0
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = np.where(has_volume, child_t / denominator, 0.0)
    return ratio, has_volume


def mean_of_ratios(
    age: np.ndarray, qty: np.ndarray, child: np.ndarray, parent_of_child: np.ndarray, n_parents: int, window: int
) -> np.ndarray:
    """Average over the window's periods with parent volume of child / parent volume.

    Returns one value per child (0 for a child of a parent with no volume).
    """
    ratio, has_volume = period_proportions(age, qty, child, parent_of_child, n_parents, window)
    periods_with_volume = has_volume.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(periods_with_volume > 0, ratio.sum(axis=1) / periods_with_volume, 0.0)


def smoothed_proportions(
    age: np.ndarray,
    qty: np.ndarray,
    child: np.ndarray,
    parent_of_child: np.ndarray,
    n_parents: int,
    window: int,
    alpha: float,
) -> np.ndarray:
    """Brown's (1962) exponential smoothing of each child's proportion over the window, oldest period first.

    p starts at the proportion of the window's first period with parent volume
    and is then updated by p_t = alpha x y_{j,t} / Y_t + (1 - alpha) x p_(t-1)
    in every later period with parent volume; a period without (Y_t = 0)
    leaves p unchanged. Returns p after the window's last period (0 for a child
    of a parent with no volume). One pass over the window's periods, each
    vectorised over all children.
    """
    ratio, has_volume = period_proportions(age, qty, child, parent_of_child, n_parents, window)
    p = np.zeros(len(parent_of_child))
    started = np.zeros(len(parent_of_child), dtype=bool)
    for col in range(window - 1, -1, -1):  # age window .. 1: oldest to newest
        r, has = ratio[:, col], has_volume[:, col]
        p = np.where(has, np.where(started, alpha * r + (1.0 - alpha) * p, r), p)
        started |= has
    return p


def shortage_periods(history: pd.DataFrame, exclude: bool) -> np.ndarray:
    """True on every history row whose parent x period has a recorded shortage on any row.

    Only with `exclude` (`cleansing.shortages: exclude`): these rows count neither toward
    shares nor toward the parent baseline. Under `fill_baseline` the cleansing
    stage has already replaced their values, so they count like any other row.
    A history without a `shortage` column has none.
    """
    if not exclude or "shortage" not in history.columns or history.empty:
        return np.zeros(len(history), dtype=bool)
    flag = history["shortage"].to_numpy(bool)
    if not flag.any():
        return flag
    code, _ = factorize(history, PARENT + ["period_start"])
    short = np.zeros(int(code.max()) + 1, dtype=bool)
    short[code[flag]] = True
    return short[code]


def complete_children(children: pd.DataFrame, settings: ShareSettings, cycle_date: pd.Timestamp) -> pd.DataFrame:
    """`children` with every lifecycle column, defaults filled in for the absent ones.

    Only the leaf keys and product_class are required. Absent columns mean: active
    in the whole horizon, established (`own_periods` = min_history_periods), no
    reference customer, scale or initial share.
    """
    out = children.reset_index(drop=True).copy()
    starts = horizon_starts(cycle_date, settings.horizon, settings.period)
    defaults = {
        "first_active_period": starts[0],
        "last_active_period": starts[-1],
        "own_periods": settings.min_history_periods,
        "reference_customer": None,
        "scale": np.nan,
        "initial_share": np.nan,
    }
    for column, value in defaults.items():
        if column not in out.columns:
            out[column] = value
    out["reference_customer"] = out["reference_customer"].astype(object).where(out["reference_customer"].notna(), None)
    out["scale"] = pd.to_numeric(out["scale"]).astype(float)
    out["initial_share"] = pd.to_numeric(out["initial_share"]).astype(float)
    out["own_periods"] = out["own_periods"].astype(np.int64)
    return out


def split_shares(
    parent_code: np.ndarray,
    n_parents: int,
    history_share: np.ndarray,
    rule: np.ndarray,
    ref_pos: np.ndarray,
    scale: np.ndarray,
    initial_share: np.ndarray,
    active: np.ndarray,
) -> tuple[np.ndarray, np.ndarray]:
    """Shares of every child in every period, per the rules of the module docstring.

    parent_code (n,): parent of each child, 0..n_parents-1. history_share (n,)
    or (n, T): p_j of established children (ignored for new ones), the same in
    every period or one per period (the per-period basis of `seasonal` and
    `forecast_proportions`, see `period_basis`). rule (n,): the child's
    lifecycle_rule. ref_pos (n,): row of the reference child for `reference`
    rows (ignored elsewhere). scale, initial_share (n,): used by their rule.
    active (n, T) bool: the child is active in period t.

    Returns (shares (n, T), all_zero (n_parents, T)): shares sum to 1 per parent
    and period, except where all_zero (no active child holds any weight).
    """
    n, t = active.shape
    act = active.astype(float)
    new = np.isin(rule, NEW_CUSTOMER_RULES)
    is_ref = rule == "reference"
    is_init = rule == "initial_share"
    base = np.asarray(history_share, dtype=float)
    p = np.where(new[:, None], 0.0, base if base.ndim == 2 else base[:, None])  # (n, T) or (n, 1)
    ref = np.where(is_ref, ref_pos, 0)
    k = np.where(is_ref, scale, 0.0)
    # what the active new customers ask of each reference, as a multiple of its share
    asked = np.zeros((n, t))
    np.add.at(asked, ref[is_ref], k[is_ref, None] * act[is_ref])
    cut = np.where(asked > 1.0, 1.0 / np.where(asked > 1.0, asked, 1.0), 1.0)
    take = np.where(is_ref[:, None], k[:, None] * p[ref] * cut[ref] * act, 0.0)
    given = np.zeros((n, t))
    np.add.at(given, ref[is_ref], take[is_ref])
    weight = np.clip(p - given, 0.0, None) * act * (~new)[:, None] + take
    s_init = np.where(is_init[:, None], np.nan_to_num(initial_share)[:, None] * act, 0.0)

    weight_sum = np.zeros((n_parents, t))
    np.add.at(weight_sum, parent_code, weight)
    init_sum = np.zeros((n_parents, t))
    np.add.at(init_sum, parent_code, s_init)
    w_sum, i_sum = weight_sum[parent_code], init_sum[parent_code]
    kept = 1.0 - np.minimum(i_sum, 1.0)  # what the initial shares leave to the others
    with np.errstate(invalid="ignore", divide="ignore"):
        from_weight = np.where(w_sum > 0, weight / w_sum * kept, 0.0)
        # each initial share's part of the initial total (<= 1), times what the total may take:
        # min(S, 1) beside weighted children, all of it when there are none
        part = np.where(i_sum > 0, s_init / i_sum, 0.0)
        from_init = part * np.where(w_sum > 0, np.minimum(i_sum, 1.0), 1.0)
    shares = np.clip(from_weight + from_init, 0.0, 1.0)
    all_zero = (weight_sum <= 0) & (init_sum <= 0)
    return shares, all_zero


def _history_shares(
    history: pd.DataFrame, children: pd.DataFrame, established: np.ndarray, settings: ShareSettings, cycle_ord: int
) -> dict[str, np.ndarray]:
    """History share, window and fallback of every child (new children: share 0)."""
    period = settings.period
    n = len(children)
    parent_code, parents = factorize(children, PARENT)
    n_parents = len(parents)
    child_of_row = lookup(history, LEAF, children)
    row_ok = (child_of_row >= 0) & ~shortage_periods(history, settings.exclude_shortages)
    child = child_of_row[row_ok]
    qty = history["quantity"].to_numpy(float)[row_ok]
    age = cycle_ord - period_ordinal(history["period_start"], period)[row_ok]
    est_row = established[child]  # only established children's history makes the shares

    out = {
        "history_share": np.zeros(n),
        "window_used": np.zeros(n, dtype=np.int64),
        "fallback": np.full(n, "even", dtype=object),
        "child_volume": np.zeros(n),
        "parent_volume": np.zeros(n),
        "method": np.empty(n, dtype=object),
        "window": np.zeros(n, dtype=np.int64),
    }
    for name, pc in settings.rules.items():  # a few classes, not a loop over series
        in_class = (children["product_class"] == name).to_numpy()
        if not in_class.any():
            continue
        out["method"][in_class] = pc.method
        out["window"][in_class] = pc.window
        decided = ~in_class  # children of other classes are not ours to decide
        for w in (pc.window, *pc.fallback_windows):
            cv = window_volumes(age, qty, child, n, w)
            pv = np.bincount(parent_code, weights=cv * established, minlength=n_parents)[parent_code]
            take = ~decided & (pv > 0)
            if pc.method == "mean_of_ratios":
                s = mean_of_ratios(age[est_row], qty[est_row], child[est_row], parent_code, n_parents, w)
            elif pc.method == "smoothed":
                s = smoothed_proportions(age[est_row], qty[est_row], child[est_row], parent_code, n_parents, w, pc.smoothing)
            else:  # pooled; and the pooled summary (and per-period fallback) of the per-period methods
                s = np.divide(cv, pv, out=np.zeros(n), where=pv > 0) * established
            out["history_share"][take] = s[take]
            out["window_used"][take] = w
            out["fallback"][take] = "none" if w == pc.window else "longer_window"
            out["child_volume"][take] = cv[take]
            out["parent_volume"][take] = pv[take]
            decided |= take
        even = ~decided
        if even.any():
            counts = np.bincount(parent_code[even & established], minlength=n_parents)
            with np.errstate(divide="ignore"):
                out["history_share"][even] = np.where(established[even], 1.0 / counts[parent_code[even]], 0.0)
            # with no volume in any window the child volume is reported over the configured window
            out["child_volume"][even] = window_volumes(age, qty, child, n, pc.window)[even]
    return out


def _lifecycle_rules(children: pd.DataFrame, established: np.ndarray, settings: ShareSettings, cycle_date: pd.Timestamp):
    """(rule, ref_pos, scale, initial_share, detail) per child; see the module docstring."""
    n_min = settings.min_history_periods
    starts = horizon_starts(cycle_date, settings.horizon, settings.period)
    new = ~established
    reference = children["reference_customer"]
    has_ref = new & reference.notna().to_numpy()
    ref_key = children[PARENT].assign(customer=reference.fillna("").to_numpy())
    ref_pos = lookup(ref_key, LEAF, children)
    ref_ok = has_ref & (ref_pos >= 0) & established[np.clip(ref_pos, 0, None)]
    has_init = new & ~ref_ok & children["initial_share"].notna().to_numpy()
    awaiting = new & ~ref_ok & ~has_init
    first = pd.DatetimeIndex(children["first_active_period"])
    last = pd.DatetimeIndex(children["last_active_period"])
    phase_in = established & (first > starts[0])
    phase_out = established & ~phase_in & (last < starts[-1])
    rule = np.select(
        [ref_ok, has_init, awaiting, phase_in, phase_out], NEW_CUSTOMER_RULES + ("phase_in", "phase_out"), "none"
    ).astype(object)

    scale = np.where(ref_ok, children["scale"].fillna(settings.reference_scale).to_numpy(float), np.nan)
    initial = np.where(has_init, children["initial_share"].to_numpy(float), np.nan)

    # the rule in words; built as whole columns (one string per child)
    ref_text = reference.fillna("").astype(str)
    own = children["own_periods"].astype(str)
    history_text = own + " of " + str(n_min) + " periods of own history"
    no_ref = pd.Series(
        np.where(
            has_ref & ~ref_ok,
            "reference " + ref_text + " is not an established customer of this product x site; ",
            "",
        ),
        index=children.index,
    )
    detail = pd.Series("share from history", index=children.index, dtype=object)
    detail[ref_ok] = (
        "new customer (" + history_text[ref_ok] + "): "
        + pd.Series(scale, index=children.index)[ref_ok].map("{:g}".format)
        + " x the share of reference " + ref_text[ref_ok] + ", taken from it"
    )
    detail[has_init] = (
        "new customer (" + history_text[has_init] + "): " + no_ref[has_init] + "initial share "
        + pd.Series(initial, index=children.index)[has_init].map("{:g}".format) + ", the others scaled by 1 - it"
    )
    detail[awaiting] = (
        "new customer (" + history_text[awaiting] + "): " + no_ref[awaiting]
        + "no reference customer or initial share, so no share until " + str(n_min) + " periods of history"
    )
    detail[phase_in] = "share from history; active from " + pd.Series(first.strftime("%Y-%m-%d"), index=children.index)[phase_in]
    detail[phase_out] = "share from history; active until " + pd.Series(last.strftime("%Y-%m-%d"), index=children.index)[phase_out]
    late = (ref_ok | has_init | awaiting) & (first > starts[0])
    detail[late] = detail[late] + "; active from " + pd.Series(first.strftime("%Y-%m-%d"), index=children.index)[late]
    return rule, ref_pos, scale, initial, detail.to_numpy(object)


def compute_shares(
    history: pd.DataFrame, children: pd.DataFrame, settings: ShareSettings, cycle_date: pd.Timestamp
) -> pd.DataFrame:
    """The share table: one row per child, with its base share and lifecycle rule.

    history: lifecycle history (leaf keys, period_start, quantity, optional shortage).
    children: from `active_children` (leaf keys, product_class and the lifecycle
    columns; see `complete_children` for the defaults of absent ones).
    """
    settings = ShareSettings.of(settings)
    period = settings.period
    cycle_ord = int(period_ordinal(pd.DatetimeIndex([cycle_date]), period)[0])
    children = complete_children(children, settings, cycle_date)
    n = len(children)
    established = (children["own_periods"] >= settings.min_history_periods).to_numpy()
    base = _history_shares(history, children, established, settings, cycle_ord)
    rule, ref_pos, scale, initial, detail = _lifecycle_rules(children, established, settings, cycle_date)
    parent_code, parents = factorize(children, PARENT)
    share, _ = split_shares(
        parent_code, len(parents), base["history_share"], rule, ref_pos, scale, initial, np.ones((n, 1), dtype=bool)
    )

    out = children[LEAF].copy()
    out["cycle_date"] = cycle_date
    out["product_class"] = children["product_class"].to_numpy()
    out["share"] = share[:, 0]
    for column in ("history_share", "method", "window", "window_used", "fallback", "child_volume", "parent_volume"):
        out[column] = base[column]
    start_age = np.where(base["window_used"] > 0, base["window_used"], base["window"])
    out["window_start"] = ordinal_to_start(cycle_ord - start_age, period)
    out["lifecycle_rule"] = rule
    out["first_active_period"] = pd.DatetimeIndex(children["first_active_period"])
    out["last_active_period"] = pd.DatetimeIndex(children["last_active_period"])
    out["own_periods"] = children["own_periods"].to_numpy()
    out["reference_customer"] = np.where(rule == "reference", children["reference_customer"].to_numpy(object), None)
    out["scale"] = scale
    out["initial_share"] = initial
    out["lifecycle_detail"] = detail
    return out[SHARE_COLUMNS].sort_values(LEAF, kind="stable").reset_index(drop=True)


def reference_positions(shares: pd.DataFrame) -> np.ndarray:
    """Row of each `reference` row's reference customer in the same table (-1 elsewhere)."""
    key = shares[PARENT].assign(customer=shares["reference_customer"].fillna("").to_numpy())
    pos = lookup(key, LEAF, shares)
    return np.where(shares["lifecycle_rule"].to_numpy() == "reference", pos, -1)


def new_customers(shares: pd.DataFrame) -> pd.DataFrame:
    """The new customers of a share table and how their share was set (for the planner)."""
    new = shares[shares["lifecycle_rule"].isin(NEW_CUSTOMER_RULES)]
    return new[LEAF + ["lifecycle_rule", "share", "own_periods", "first_active_period", "lifecycle_detail"]].reset_index(drop=True)


def find_new_customers_without_share(shares: pd.DataFrame) -> pd.DataFrame:
    """New customers that get no share until they have enough history (rule `awaiting_history`)."""
    rows = shares[shares["lifecycle_rule"] == "awaiting_history"]
    return rows[LEAF + ["own_periods", "first_active_period", "lifecycle_detail"]].reset_index(drop=True)
