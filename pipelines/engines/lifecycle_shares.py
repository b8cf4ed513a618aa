"""New customers and the lifecycle rules: how each child's share is set over the horizon, and the shares of a period.

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

import numpy as np
import pandas as pd
from numba import njit

from pipelines.calendar import horizon_starts
from pipelines.engines.share_settings import ShareSettings
from pipelines.keys import LEAF, PARENT, lookup
from pipelines.vocabulary import NEW_CUSTOMER_RULES


def counts_by(flags: np.ndarray, code: np.ndarray, n: int, keep: np.ndarray | None = None) -> np.ndarray:
    """(n, T) bool: any row of each `code` True in the column (`np.logical_or.at` on False), over the rows with
    `keep` (m,) True only (None: every row); one compiled pass (`_any_by`), no masked copy of `flags`."""
    keep = np.ones(len(code), dtype=bool) if keep is None else np.asarray(keep, dtype=bool)
    return _any_by(np.asarray(flags, dtype=bool), np.asarray(code, dtype=np.int64), int(n), keep)


@njit(cache=True)
def _any_by(flags, code, n, keep):
    out = np.zeros((n, flags.shape[1]), dtype=np.bool_)
    for j in range(flags.shape[0]):
        if keep[j]:
            row = out[code[j]]
            for col in range(flags.shape[1]):
                row[col] |= flags[j, col]
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

    One compiled pass per period (`_split_periods`) doing numpy's arithmetic step by step: the same bits as the
    whole-array form (the parent sums in row order from 0.0, as bincount; numpy's maximum, minimum, clip and
    nan_to_num on signed zeros and NaN), without a dozen (children x periods) temporaries.
    """
    n = active.shape[0]
    base = np.asarray(history_share, dtype=float)
    base = base.reshape(n, -1) if base.ndim == 2 else base.reshape(n, 1)
    return _split_periods(
        np.asarray(parent_code, dtype=np.int64),
        int(n_parents),
        base,
        np.isin(rule, NEW_CUSTOMER_RULES),
        np.flatnonzero(rule == "reference"),
        rule == "initial_share",
        np.asarray(ref_pos, dtype=np.int64),
        np.asarray(scale, dtype=float),
        np.asarray(initial_share, dtype=float),
        np.asarray(active, dtype=bool),
    )


@njit(cache=True)
def _split_periods(parent_code, n_parents, base, new, refs, is_init, ref_pos, scale, initial_share, active):
    """`split_shares`, period by period. base (n, 1) or (n, T); refs: the rows of rule `reference`, ascending.

    In numpy's terms, per period (act = active as 0.0 / 1.0; every sum over rows in order from 0.0):
    p = where(new, 0, base); asked[ref] += scale * act over the references' rows; cut = 1 / asked where above
    1, else 1; take = scale * p[ref] * cut * act; given[ref] += take; weight = maximum(p - given, 0) * act *
    (not new) + take; init = nan_to_num(initial_share) * act on the initial-share rows, else 0; W, I: their
    sums per parent; share = clip(where(W > 0, weight / W * (1 - minimum(I, 1)), 0) + where(I > 0, init / I,
    0) * where(W > 0, minimum(I, 1), 1), 0, 1); all_zero = (W <= 0) & (I <= 0)."""
    n, t = active.shape
    per_period = base.shape[1] > 1
    big = 1.7976931348623157e308  # nan_to_num's stand-in for an infinity
    shares = np.empty((n, t))
    all_zero = np.empty((n_parents, t), dtype=np.bool_)
    init = np.zeros(n)
    for j in range(n):  # nan_to_num(initial_share)
        v = initial_share[j]
        init[j] = 0.0 if np.isnan(v) else (big if v == np.inf else (-big if v == -np.inf else v))
    p = np.zeros(n)
    asked = np.zeros(n)
    take = np.zeros(n)
    given = np.zeros(n)
    weight = np.zeros(n)
    s_init = np.zeros(n)
    w_sum = np.zeros(n_parents)
    i_sum = np.zeros(n_parents)
    for col in range(t):
        b = col if per_period else 0
        for j in range(n):
            p[j] = 0.0 if new[j] else base[j, b]
        for r in refs:
            asked[ref_pos[r]] = 0.0
            given[ref_pos[r]] = 0.0
        for r in refs:
            asked[ref_pos[r]] += scale[r] * (1.0 if active[r, col] else 0.0)
        for r in refs:
            at = asked[ref_pos[r]]
            cut = 1.0 / at if at > 1.0 else 1.0
            take[r] = scale[r] * p[ref_pos[r]] * cut * (1.0 if active[r, col] else 0.0)
        for r in refs:
            given[ref_pos[r]] += take[r]
        w_sum[:] = 0.0
        i_sum[:] = 0.0
        for j in range(n):
            act = 1.0 if active[j, col] else 0.0
            free = p[j] - given[j]
            if not np.isnan(free) and not free > 0.0:  # numpy's maximum(free, 0.0): 0.0 also for -0.0
                free = 0.0
            weight[j] = free * act * (0.0 if new[j] else 1.0) + take[j]
            s_init[j] = init[j] * act if is_init[j] else 0.0
            w_sum[parent_code[j]] += weight[j]
            i_sum[parent_code[j]] += s_init[j]
        for j in range(n):
            w, i = w_sum[parent_code[j]], i_sum[parent_code[j]]
            capped = i if (np.isnan(i) or i < 1.0) else 1.0  # numpy's minimum(i, 1.0)
            from_weight = weight[j] / w * (1.0 - capped) if w > 0 else 0.0
            part = s_init[j] / i if i > 0 else 0.0
            share = from_weight + part * (capped if w > 0 else 1.0)
            if share < 0.0:  # numpy's clip(share, 0, 1): NaN and -0.0 kept
                share = 0.0
            elif share > 1.0:
                share = 1.0
            shares[j, col] = share
        for k in range(n_parents):
            all_zero[k, col] = w_sum[k] <= 0 and i_sum[k] <= 0
    return shares, all_zero


def lifecycle_rules(
    children: pd.DataFrame,
    established: np.ndarray,
    settings: ShareSettings,
    cycle_date: pd.Timestamp,
    parent_code: np.ndarray | None = None,
    detail: bool = True,
):
    """(rule, ref_pos, scale, initial_share, detail) per child; see the module docstring. parent_code: each
    child's parent (`factorize(children, PARENT)`), when the caller has it: a reference customer is then looked
    for among its own parent's children only. detail False: the rule in words is not written (None), for a
    caller that reads the shares only (a named share basis)."""
    n_min = settings.min_history_periods
    starts = horizon_starts(cycle_date, settings.horizon, settings.period)
    new = ~established
    reference = children["reference_customer"]
    has_ref = new & reference.notna().to_numpy()
    asks = np.flatnonzero(has_ref)  # only a new customer's reference is looked up (-1 elsewhere)
    ref_pos = np.full(len(children), -1, dtype=np.int64)
    ref_key = children[PARENT].iloc[asks].assign(customer=reference.to_numpy()[asks])
    ref_pos[asks] = _positions_among_parent(ref_key, children, parent_code, asks)
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
    if not detail:
        return rule, ref_pos, scale, initial, None

    # the rule in words; built as whole columns, the new customers' texts on their rows only
    new_rows = ref_ok | has_init | awaiting
    ref_text = reference[new_rows].fillna("").astype(str)
    own = children["own_periods"][new_rows].astype(str)
    history_text = own + " of " + str(n_min) + " periods of own history"
    no_ref = pd.Series(
        np.where(
            (has_ref & ~ref_ok)[new_rows],
            "reference " + ref_text + " is not an established customer of this product x site; ",
            "",
        ),
        index=ref_text.index,
    )
    text = pd.Series("share from history", index=children.index, dtype=object)
    on_ref, on_init, on_awaiting = ref_ok[new_rows], has_init[new_rows], awaiting[new_rows]
    text[ref_ok] = (
        "new customer (" + history_text[on_ref] + "): "
        + pd.Series(scale, index=children.index)[ref_ok].map("{:g}".format)
        + " x the share of reference " + ref_text[on_ref] + ", taken from it"
    )
    text[has_init] = (
        "new customer (" + history_text[on_init] + "): " + no_ref[on_init] + "initial share "
        + pd.Series(initial, index=children.index)[has_init].map("{:g}".format) + ", the others scaled by 1 - it"
    )
    text[awaiting] = (
        "new customer (" + history_text[on_awaiting] + "): " + no_ref[on_awaiting]
        + "no reference customer or initial share, so no share until " + str(n_min) + " periods of history"
    )

    def day(dates: pd.DatetimeIndex, rows: np.ndarray) -> pd.Series:  # only the rows' dates written as text
        return pd.Series(dates[rows].strftime("%Y-%m-%d"), index=children.index[rows])

    text[phase_in] = "share from history; active from " + day(first, phase_in)
    text[phase_out] = "share from history; active until " + day(last, phase_out)
    late = (ref_ok | has_init | awaiting) & (first > starts[0])
    text[late] = text[late] + "; active from " + day(first, late)
    return rule, ref_pos, scale, initial, text.to_numpy(object)


def reference_positions(shares: pd.DataFrame, parent_code: np.ndarray | None = None) -> np.ndarray:
    """Row of each `reference` row's reference customer in the same table (-1 elsewhere). parent_code: each
    row's parent (`factorize(shares, PARENT)`), when the caller has it: a reference is then looked for among the
    children of its own parent only (its key holds that parent's), not among every row's keys."""
    rows = np.flatnonzero(shares["lifecycle_rule"].to_numpy() == "reference")  # only theirs looked up
    key = shares[PARENT].iloc[rows].assign(customer=shares["reference_customer"].fillna("").to_numpy()[rows])
    pos = np.full(len(shares), -1, dtype=np.int64)
    pos[rows] = _positions_among_parent(key, shares, parent_code, rows)
    return pos


def _positions_among_parent(key: pd.DataFrame, table: pd.DataFrame, parent_code, rows: np.ndarray) -> np.ndarray:
    """`lookup(key, LEAF, table)` for keys that name a customer of the parent of table's `rows` (one per key):
    looked for among the rows of those parents only where `parent_code` (each table row's parent) is given."""
    if parent_code is None:
        return lookup(key, LEAF, table)
    among = np.flatnonzero(np.isin(parent_code, parent_code[rows]))
    found = lookup(key, LEAF, table.iloc[among])
    return np.where(found >= 0, among[found], -1)


def new_customers(shares: pd.DataFrame) -> pd.DataFrame:
    """The new customers of a share table and how their share was set (for the planner)."""
    new = shares[shares["lifecycle_rule"].isin(NEW_CUSTOMER_RULES)]
    return new[
        LEAF + ["lifecycle_rule", "share", "own_periods", "first_active_period", "lifecycle_detail"]
    ].reset_index(drop=True)


def find_new_customers_without_share(shares: pd.DataFrame) -> pd.DataFrame:
    """New customers that get no share until they have enough history (rule `awaiting_history`)."""
    rows = shares[shares["lifecycle_rule"] == "awaiting_history"]
    return rows[LEAF + ["own_periods", "first_active_period", "lifecycle_detail"]].reset_index(drop=True)
