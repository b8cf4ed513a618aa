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

New customers and the shares of a period (the lifecycle rules) are in
`pipelines.engines.lifecycle_shares`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from pipelines.calendar import horizon_starts, ordinal_to_start, period_ordinal
from pipelines.engines.hierarchy import parent_sums
from pipelines.engines.lifecycle_shares import lifecycle_rules, split_shares
from pipelines.engines.share_rows import ShareRows, child_sums, history_rows, period_sums
from pipelines.engines.share_settings import ShareSettings
from pipelines.keys import LEAF, LEAF_ID, PARENT, PARENT_ID, Coded, coded, extend_ids, factorize

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


def cell_proportions(child_t: np.ndarray, parent_of_child: np.ndarray, n_parents: int) -> tuple[np.ndarray, np.ndarray]:
    """(ratio (n, window), has_volume (n, window)): y_{j,t} / Y_t of every child and window period, from the child
    volumes per window period (`child_t`, n x window; column a - 1 holds age a, column 0 = the period before the
    cycle). Y_t is the volume of the child's parent (its children's, summed in order); where Y_t = 0 the ratio is 0
    and has_volume is False."""
    parent_t = parent_sums(child_t, parent_of_child, n_parents)
    denominator = parent_t[parent_of_child]
    has_volume = denominator > 0
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = np.where(has_volume, child_t / denominator, 0.0)
    return ratio, has_volume


def ratio_mean(ratio: np.ndarray, has_volume: np.ndarray) -> np.ndarray:
    """`mean_of_ratios`: the average over the window's periods with parent volume of child / parent volume
    (`cell_proportions`' ratios); one value per child (0 for a child of a parent with no volume)."""
    periods_with_volume = has_volume.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(periods_with_volume > 0, ratio.sum(axis=1) / periods_with_volume, 0.0)


def ratio_smoothed(ratio: np.ndarray, has_volume: np.ndarray, alpha: float) -> np.ndarray:
    """`smoothed`: Brown's (1962) exponential smoothing of each child's proportion over the window (`cell_proportions`'
    ratios), oldest period first.

    p starts at the proportion of the window's first period with parent volume
    and is then updated by p_t = alpha x y_{j,t} / Y_t + (1 - alpha) x p_(t-1)
    in every later period with parent volume; a period without (Y_t = 0)
    leaves p unchanged. Returns p after the window's last period (0 for a child
    of a parent with no volume). One pass over the window's periods, each
    vectorised over all children.
    """
    p = np.zeros(len(ratio))
    started = np.zeros(len(ratio), dtype=bool)
    for col in range(ratio.shape[1] - 1, -1, -1):  # age window .. 1: oldest to newest
        r, has = ratio[:, col], has_volume[:, col]
        p = np.where(has, np.where(started, alpha * r + (1.0 - alpha) * p, r), p)
        started |= has
    return p


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


def _history_shares(
    rows: ShareRows, children: pd.DataFrame, established: np.ndarray, settings: ShareSettings, leaf_of_child: np.ndarray
) -> dict[str, np.ndarray]:
    """History share, window and fallback of every child (new children: share 0).

    Summed per leaf id of the history (`share_rows`), every child's rows in their order, so each sum adds the same
    values in the same order as over the child's own rows: the configured windows of every class in one pass over
    the rows that count; a fallback window, and a per-period proportion, over the rows of the children it is for.
    leaf_of_child: each child's leaf id in the history (-1: none)."""
    n = len(children)
    parent_code, parents = factorize(children, PARENT)
    n_parents = len(parents)
    classes = children["product_class"].to_numpy(object)
    class_of_child = np.full(n, len(settings.rules), dtype=np.int16)
    for k, name in enumerate(settings.rules):
        class_of_child[classes == name] = k
    has_rows = leaf_of_child >= 0
    window_of_class = np.array([settings.rule(name).window for name in settings.rules] + [0], dtype=np.int32)
    window_of_leaf = np.zeros(rows.n_leaves, dtype=np.int32)  # 0: a leaf of no child, whose rows never count
    window_of_leaf[leaf_of_child[has_rows]] = window_of_class[class_of_child[has_rows]]
    configured = child_sums(rows, None, window_of_leaf, leaf_of_child)

    out = {
        "history_share": np.zeros(n),
        "window_used": np.zeros(n, dtype=np.int64),
        "fallback": np.full(n, "even", dtype=object),
        "child_volume": np.zeros(n),
        "parent_volume": np.zeros(n),
        "method": np.empty(n, dtype=object),
        "window": np.zeros(n, dtype=np.int64),
    }
    for k, name in enumerate(settings.rules):  # a few classes, not a loop over series
        in_class = class_of_child == k
        if not in_class.any():
            continue
        pc = settings.rule(name)
        out["method"][in_class] = pc.method
        out["window"][in_class] = pc.window
        members = np.flatnonzero(in_class & established)  # the class's established children, in child order
        member_of = np.full(n, -1, dtype=np.int64)
        member_of[members] = np.arange(len(members))
        decided = ~in_class  # children of other classes are not ours to decide
        for w in (pc.window, *pc.fallback_windows):
            # the rows of the children still undecided (all of the class's at its configured window), in order
            open_leaf = np.zeros(rows.n_leaves, dtype=bool)
            open_leaf[leaf_of_child[~decided & has_rows]] = True
            cv = configured if w == pc.window else child_sums(rows, open_leaf, w, leaf_of_child)
            pv = np.bincount(parent_code, weights=cv * established, minlength=n_parents)[parent_code]
            take = ~decided & (pv > 0)
            if pc.method in ("mean_of_ratios", "smoothed"):  # the established members' rows that count, in order
                member_of_leaf = np.full(rows.n_leaves, -1, dtype=np.int64)
                with_rows = members[has_rows[members]]
                with_rows = with_rows[open_leaf[leaf_of_child[with_rows]]]  # the undecided ones
                member_of_leaf[leaf_of_child[with_rows]] = member_of[with_rows]
                ratio = cell_proportions(period_sums(rows, member_of_leaf, w, len(members)), parent_code[members],
                                         n_parents)
                s = np.zeros(n)
                by_ratio = pc.method == "mean_of_ratios"
                s[members] = ratio_mean(*ratio) if by_ratio else ratio_smoothed(*ratio, pc.smoothing)
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
            out["child_volume"][even] = configured[even]
    return out


@dataclass(frozen=True)
class ChildFrame:
    """What a share table takes from its children, the history's ids and the lifecycle rules alone, the same
    for every window and method: the share tuning's candidates of one origin make it once (`child_frame`)."""

    children: pd.DataFrame  # complete_children's
    established: np.ndarray
    lifecycle: tuple  # lifecycle_rules': rule, ref_pos, scale, initial_share, detail
    parent_code: np.ndarray
    n_parents: int
    ids: tuple[np.ndarray, np.ndarray]  # extend_ids': leaf_id, parent_id
    rows: ShareRows  # the history's rows (`share_rows`)
    leaf_of_child: np.ndarray  # each child's leaf id in the history (-1: none)


def child_frame(
    history: pd.DataFrame,
    children: pd.DataFrame,
    settings: ShareSettings,
    cycle_date: pd.Timestamp,
    keys: Coded | None = None,
    rows: ShareRows | None = None,
    detail: bool = True,
) -> ChildFrame:
    """The window- and method-free part of `compute_shares` (it reads the lifecycle settings only); keys:
    `coded(history)`, rows: `history_rows(...)`, when the caller has them (the history is read once). detail
    False: without the lifecycle rules in words (`lifecycle_rules`), for `horizon_basis` only."""
    settings = ShareSettings.of(settings)
    keys = keys if keys is not None else coded(history)
    rows = rows if rows is not None else history_rows(history, keys, settings, cycle_date)
    children = complete_children(children, settings, cycle_date)
    established = (children["own_periods"] >= settings.min_history_periods).to_numpy()
    parent_code, parents = factorize(children, PARENT)
    leaf_of_child = rows.child_leaves(keys, children)
    return ChildFrame(
        children,
        established,
        lifecycle_rules(children, established, settings, cycle_date, parent_code, detail=detail),
        parent_code,
        len(parents),
        extend_ids(children, history, keys, leaf_of_child),
        rows,
        leaf_of_child,
    )


def compute_shares(
    history: pd.DataFrame,
    children: pd.DataFrame,
    settings: ShareSettings,
    cycle_date: pd.Timestamp,
    frame: ChildFrame | None = None,
    keys: Coded | None = None,
    rows: ShareRows | None = None,
) -> pd.DataFrame:
    """The share table: one row per child, with its base share and lifecycle rule.

    history: lifecycle history (leaf keys, period_start, quantity, optional shortage).
    children: from `active_children` (leaf keys, product_class and the lifecycle
    columns; see `complete_children` for the defaults of absent ones).
    frame: `child_frame` of the same history, children and cycle date, and of
    settings with the same lifecycle keys (made once for many windows and methods).
    keys: `coded(history)`, rows: `history_rows(history, keys, settings, cycle_date)`, when the caller has them."""
    settings = ShareSettings.of(settings)
    period = settings.period
    cycle_ord = int(period_ordinal(pd.DatetimeIndex([cycle_date]), period)[0])
    frame = frame or child_frame(history, children, settings, cycle_date, keys, rows)
    children, established = frame.children, frame.established
    n = len(children)
    rows = frame.rows
    if rows.exclude_shortages != settings.exclude_shortages:  # a frame made under the other shortage rule
        rows = history_rows(history, keys if keys is not None else coded(history), settings, cycle_date)
    base = _history_shares(rows, children, established, settings, frame.leaf_of_child)
    rule, ref_pos, scale, initial, detail = frame.lifecycle  # the table below is a sorted copy: the frame stays
    share, _ = split_shares(
        frame.parent_code,
        frame.n_parents,
        base["history_share"],
        rule,
        ref_pos,
        scale,
        initial,
        np.ones((n, 1), dtype=bool),
    )

    out = children[LEAF].copy()
    out[LEAF_ID], out[PARENT_ID] = frame.ids
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
    return out[SHARE_COLUMNS + [LEAF_ID, PARENT_ID]].sort_values(LEAF, kind="stable").reset_index(drop=True)


BASIS_COLUMNS = LEAF + [
    "product_class",
    "history_share",
    "method",
    "fallback",
    "lifecycle_rule",
    "first_active_period",
    "last_active_period",
    "reference_customer",
    "scale",
    "initial_share",
]


def horizon_basis(
    history: pd.DataFrame,
    children: pd.DataFrame,
    settings: ShareSettings,
    cycle_date: pd.Timestamp,
    frame: ChildFrame,
) -> pd.DataFrame:
    """What `period_shares` reads of `compute_shares`' table, with the fallback and the ids: the same rows in
    the same order (sorted by leaf key) holding the same values, without the columns only the share table
    shows (the base share, whose split `period_shares` does again per period, the window start, the volumes,
    the lifecycle rule in words). For a named share basis (`measure_inputs.share_bases_of`), which keeps its
    per-period shares and fallbacks only. BASIS_COLUMNS + leaf_id, parent_id."""
    settings = ShareSettings.of(settings)
    children, rows = frame.children, frame.rows
    if rows.exclude_shortages != settings.exclude_shortages:  # as compute_shares: a frame of the other rule
        rows = history_rows(history, coded(history), settings, cycle_date)
    base = _history_shares(rows, children, frame.established, settings, frame.leaf_of_child)
    rule = frame.lifecycle[0]
    out = children[LEAF].copy()
    out[LEAF_ID], out[PARENT_ID] = frame.ids
    out["product_class"] = children["product_class"].to_numpy()
    for column in ("history_share", "method", "fallback"):
        out[column] = base[column]
    out["lifecycle_rule"] = rule
    out["first_active_period"] = pd.DatetimeIndex(children["first_active_period"])
    out["last_active_period"] = pd.DatetimeIndex(children["last_active_period"])
    out["reference_customer"] = np.where(rule == "reference", children["reference_customer"].to_numpy(object), None)
    out["scale"] = frame.lifecycle[2]
    out["initial_share"] = frame.lifecycle[3]
    return out[BASIS_COLUMNS + [LEAF_ID, PARENT_ID]].sort_values(LEAF, kind="stable").reset_index(drop=True)
