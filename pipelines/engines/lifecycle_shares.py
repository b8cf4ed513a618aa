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

from pipelines.calendar import horizon_starts
from pipelines.engines.share_settings import ShareSettings
from pipelines.keys import LEAF, PARENT, lookup
from pipelines.vocabulary import NEW_CUSTOMER_RULES


def sums_by(values: np.ndarray, code: np.ndarray, n: int) -> np.ndarray:
    """(n, T): the rows of `values` (m, T) summed per `code` (m,) in 0..n-1, rows in order: the sums of
    `np.add.at(out, code, values)` on zeros, a column at a time by bincount (far faster)."""
    out = np.empty((values.shape[1], n))
    for col in range(values.shape[1]):  # the horizon's periods, not the series
        out[col] = np.bincount(code, weights=values[:, col], minlength=n)
    return out.T


def counts_by(flags: np.ndarray, code: np.ndarray, n: int) -> np.ndarray:
    """(n, T) bool: any row of each `code` True in the column (`np.logical_or.at` on False, by bincount)."""
    out = np.empty((flags.shape[1], n), dtype=bool)
    for col in range(flags.shape[1]):
        out[col] = np.bincount(code[flags[:, col]], minlength=n) > 0
    return out.T


SPLIT_BLOCK = 4  # horizon periods split at a time


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
    base = np.asarray(history_share, dtype=float)
    masks = np.isin(rule, NEW_CUSTOMER_RULES), rule == "reference", rule == "initial_share"
    if t <= SPLIT_BLOCK:
        return _split_block(parent_code, n_parents, base, masks, ref_pos, scale, initial_share, active)
    # every step is per period, so a block of periods at a time gives the same numbers with temporaries of
    # the block's width (the reinitialized target's split: a dozen (children x horizon) arrays otherwise)
    shares, all_zero = np.empty((n, t)), np.empty((n_parents, t), dtype=bool)
    for lo in range(0, t, SPLIT_BLOCK):
        cols = slice(lo, lo + SPLIT_BLOCK)
        shares[:, cols], all_zero[:, cols] = _split_block(
            parent_code, n_parents, base[:, cols] if base.ndim == 2 else base, masks, ref_pos, scale,
            initial_share, active[:, cols]
        )
    return shares, all_zero


def _split_block(parent_code, n_parents, base, masks, ref_pos, scale, initial_share, active):
    """`split_shares` over the periods of `active` (n, T): base (n,) or (n, T), masks: new, reference and
    initial-share rows."""
    n, t = active.shape
    act = active.astype(float)
    new, is_ref, is_init = masks
    p = np.where(new[:, None], 0.0, base if base.ndim == 2 else base[:, None])  # (n, T) or (n, 1)
    r = np.flatnonzero(is_ref)  # the few new customers with a reference: their rows only
    ref, k = ref_pos[r], scale[r]
    # what the active new customers ask of each reference, as a multiple of its share
    asked = np.zeros((n, t))
    np.add.at(asked, ref, k[:, None] * act[r])
    at_ref = asked[ref]
    cut = np.where(at_ref > 1.0, 1.0 / np.where(at_ref > 1.0, at_ref, 1.0), 1.0)
    take = np.zeros((n, t))
    take[r] = k[:, None] * p[ref] * cut * act[r]
    given = np.zeros((n, t))
    np.add.at(given, ref, take[r])
    weight = np.clip(p - given, 0.0, None) * act * (~new)[:, None] + take
    s_init = np.where(is_init[:, None], np.nan_to_num(initial_share)[:, None] * act, 0.0)

    weight_sum = sums_by(weight, parent_code, n_parents)
    init_sum = sums_by(s_init, parent_code, n_parents)
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


def lifecycle_rules(
    children: pd.DataFrame,
    established: np.ndarray,
    settings: ShareSettings,
    cycle_date: pd.Timestamp,
    detail: bool = True,
):
    """(rule, ref_pos, scale, initial_share, detail) per child; see the module docstring. detail False: the
    rule in words is not written (None), for a caller that reads the shares only (a named share basis)."""
    n_min = settings.min_history_periods
    starts = horizon_starts(cycle_date, settings.horizon, settings.period)
    new = ~established
    reference = children["reference_customer"]
    has_ref = new & reference.notna().to_numpy()
    asks = np.flatnonzero(has_ref)  # only a new customer's reference is looked up (-1 elsewhere)
    ref_pos = np.full(len(children), -1, dtype=np.int64)
    ref_key = children[PARENT].iloc[asks].assign(customer=reference.to_numpy()[asks])
    ref_pos[asks] = lookup(ref_key, LEAF, children)
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


def reference_positions(shares: pd.DataFrame) -> np.ndarray:
    """Row of each `reference` row's reference customer in the same table (-1 elsewhere)."""
    rows = np.flatnonzero(shares["lifecycle_rule"].to_numpy() == "reference")  # only theirs looked up
    key = shares[PARENT].iloc[rows].assign(customer=shares["reference_customer"].fillna("").to_numpy()[rows])
    pos = np.full(len(shares), -1, dtype=np.int64)
    pos[rows] = lookup(key, LEAF, shares)
    return pos


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
