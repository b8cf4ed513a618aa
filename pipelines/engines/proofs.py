"""The rows that break a rule of the cycle (empty = the rule holds): shares sum to one, volume only where active,
every active parent has children.

Each `find_*` function judges one asset's rows; the stage that makes the
asset returns them as the failing rows of its check (`pipelines.checks`).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from numba import njit

from pipelines.calendar import period_ordinal, span_bounds
from pipelines.checks import SHARE_TOLERANCE
from pipelines.engines.history_proofs import RUNS_UNSEEN, accounted_lines
from pipelines.keys import LEAF, PARENT, PARENT_ID, any_blank, factorize, ids_in, key_rank, lookup, part_rows, rows_in
from pipelines.text_codes import run_starts


def find_shares_not_summing_to_one(
    target: pd.DataFrame, tolerance: float = SHARE_TOLERANCE, codes: tuple[np.ndarray, np.ndarray] | None = None
) -> pd.DataFrame:
    """Parent periods whose shares neither sum to 1 nor are all 0 with a recorded reason.

    target: per-period shares (`reinitialized_target`: parent keys, period_start,
    share, zero_reason). A period summing to 1 must have no reason; an
    all-zero period must have its reason on every row.

    The parent periods are first judged on integers (bincount over the rank of the parent key and the period);
    only those not clearly passing (a sum off 1 by more than half the tolerance, or a reason missing) are
    judged again below, on their own rows, so the rows named and their sums are those of the whole table.
    codes: (each row's parent id x the periods + its period's code in order of first appearance, each row has a
    reason) of this table, when the caller has them (`reinitialized_target.parent_period_codes`).
    """
    if len(target) and ids_in(target, (PARENT_ID,)):
        rows, position = _parent_periods_in_doubt(target, tolerance, by_id=True, codes=codes)  # none: no key order
        if position is None:
            rows, position = _parent_periods_in_doubt(target, tolerance)
        out = _shares_not_summing_to_one(target.iloc[rows], tolerance)
        out.index = position[out.index.to_numpy()]  # each parent period's row number among all of the table's
        return out
    return _shares_not_summing_to_one(target, tolerance)


def _shares_not_summing_to_one(target: pd.DataFrame, tolerance: float) -> pd.DataFrame:
    t = target.assign(
        has_reason=target["zero_reason"].notna(),
        nonzero=target["share"] != 0,
    )
    # on the rank of the parent key, from the parent ids where the table carries them: the same groups in the
    # same order as the text keys give
    by_id = bool(ids_in(t, (PARENT_ID,)))
    text = {c: (c, "first") for c in PARENT} if by_id else {}
    if by_id:
        t["parent_rank"] = key_rank(t, PARENT)
    sums = (
        t.groupby(["parent_rank", "period_start"] if by_id else PARENT + ["period_start"], sort=True, observed=True)
        .agg(
            **text,
            share_sum=("share", "sum"),
            children=("share", "size"),
            with_reason=("has_reason", "sum"),
            nonzero=("nonzero", "sum"),
            zero_reason=("zero_reason", "first"),
        )
        .reset_index()
    )
    sums = sums.drop(columns=["parent_rank"]) if by_id else sums
    sums = sums[PARENT + [c for c in sums.columns if c not in PARENT]]
    sums_to_one = ((sums["share_sum"] - 1.0).abs() <= tolerance) & (sums["with_reason"] == 0)
    zero_with_reason = (sums["nonzero"] == 0) & (sums["with_reason"] == sums["children"])
    return sums[~(sums_to_one | zero_with_reason)].drop(columns=["nonzero"])


def _parent_periods_in_doubt(
    target: pd.DataFrame, tolerance: float, by_id: bool = False, codes: tuple[np.ndarray, np.ndarray] | None = None
) -> tuple[np.ndarray, np.ndarray | None]:
    """(positions of the rows of the parent periods that do not clearly pass `find_shares_not_summing_to_one`,
    the row number of each of those parent periods, in key order, among all the table's parent periods).

    With none in doubt the rows of the first row's parent period are given, so the judgement below keeps its
    columns. by_id: the groups numbered by parent id, not in key order (the same groups and sums), and with any
    in doubt no row numbers (None): those need the key order. codes: by_id's (key, has_reason) when the caller
    has them.
    """
    if by_id and codes is not None:
        key, reason = codes
    else:  # the groups of the text parent key, in its order, as below (or by id)
        rank = target[PARENT_ID].to_numpy(np.int64) if by_id else key_rank(target, PARENT)
        when, periods = pd.factorize(target["period_start"].to_numpy(), sort=not by_id)
        key = rank * len(periods) + when  # (parent key, period) in key order
        reason = target["zero_reason"].notna().to_numpy()
    # per key (parent period): its share sum (rows in order from 0.0, as bincount), rows, reasons, non-zero shares
    share_sum, rows, reasons, nonzero = key_sums(key, target["share"].to_numpy(float), reason, int(key.max()) + 1)
    with np.errstate(invalid="ignore"):
        passes = (np.abs(share_sum - 1.0) <= tolerance / 2) & (reasons == 0)
    doubt = ~(passes | ((nonzero == 0) & (reasons == rows))) & (rows > 0)  # keys no row holds: not in doubt
    if not doubt.any():
        return np.flatnonzero(key == key[0]), np.zeros(1, np.int64)
    # each parent period's row number in key order: its place among the keys some row holds
    return np.flatnonzero(doubt[key]), None if by_id else np.flatnonzero(doubt[rows > 0])


@njit(cache=True)
def key_sums(key, share, reason, n_keys):
    """(share sum, rows, rows with a reason, rows with a share other than 0 (NaN counts)) per key 0..n_keys-1,
    in one pass; each sum adds its rows' shares in row order from 0.0 (`np.bincount` with weights)."""
    share_sum = np.zeros(n_keys)
    rows = np.zeros(n_keys, dtype=np.int64)
    reasons = np.zeros(n_keys, dtype=np.int64)
    nonzero = np.zeros(n_keys, dtype=np.int64)
    for i in range(len(key)):
        k = key[i]
        share_sum[k] += share[i]
        rows[k] += 1
        reasons[k] += reason[i]
        nonzero[k] += share[i] != 0.0
    return share_sum, rows, reasons, nonzero


def find_volume_after_phase_out(
    leaf: pd.DataFrame, spans: pd.DataFrame, period: str, span_rows: np.ndarray | None = None
) -> pd.DataFrame:
    """Leaf forecast rows with volume in a period after the customer's span ended.

    span_rows: each leaf row's row in `spans` (`rows_in`), when the caller has it."""
    _, to_ord = span_bounds(spans, period)
    pos = rows_in(leaf, spans, LEAF) if span_rows is None else span_rows
    end = np.where(pos >= 0, to_ord[np.clip(pos, 0, None)], np.nan)
    with np.errstate(invalid="ignore"):
        after = (period_ordinal(leaf["period_start"], period) > end) & (leaf["forecast"].to_numpy() != 0)
    rows = np.flatnonzero(after)  # the few rows first, then their columns: no copy of the whole table
    out = leaf.iloc[rows][LEAF + ["period_start", "forecast"]].copy()
    out["active_to"] = spans["active_to"].to_numpy()[pos[after]] if after.any() else pd.Series(dtype="datetime64[ns]")
    return out


def find_volume_outside_active_span(
    parent: pd.DataFrame,
    leaf: pd.DataFrame,
    spans: pd.DataFrame,
    products: pd.DataFrame,
    period: str,
    span_rows: np.ndarray | None = None,
) -> pd.DataFrame:
    """Forecast rows with volume where the customer span has not started or the product's span does not cover the
    period.

    Leaf rows are judged against their customer span's start and their product's
    span; parent rows against the product's span. (Volume after a customer
    span's end is `find_volume_after_phase_out`.) span_rows: each leaf row's row in `spans`, when the caller
    has it.
    """
    p_from, p_to = span_bounds(products, period)
    s_from, _ = span_bounds(spans, period)

    def product_bounds(frame: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
        pos = part_rows(frame, ["product"], products)  # each id's product looked up once
        return (
            np.where(pos >= 0, p_from[np.clip(pos, 0, None)], np.nan),
            np.where(pos >= 0, p_to[np.clip(pos, 0, None)], np.nan),
        )

    out = []
    for grain, frame in (("parent", parent), ("leaf", leaf)):
        ords = period_ordinal(frame["period_start"], period)
        lo, hi = product_bounds(frame)
        why = np.full(len(frame), None, dtype=object)
        with np.errstate(invalid="ignore"):
            off = (ords < lo) | (ords > hi)
            why[off] = "product not active"
            if grain == "leaf":
                pos = rows_in(frame, spans, LEAF) if span_rows is None else span_rows
                start = np.where(pos >= 0, s_from[np.clip(pos, 0, None)], np.nan)
                not_started = (ords < start) & ~off
                why[not_started] = "customer span not started"
                off |= not_started
        bad = off & (frame["forecast"].to_numpy() != 0)
        keys = LEAF if grain == "leaf" else PARENT
        rows = frame.iloc[np.flatnonzero(bad)]
        out.append(rows[keys + ["period_start", "forecast"]].assign(grain=grain, why=why[bad]))
    rows = [f for f in out if len(f)]
    return pd.concat(rows, ignore_index=True) if rows else out[1].iloc[0:0]


def find_negative(frame: pd.DataFrame, column: str = "forecast") -> pd.DataFrame:
    """Rows with a negative value."""
    return frame[frame[column] < 0]


def find_active_parents_without_children(
    parent: pd.DataFrame,
    leaf: pd.DataFrame,
    spans: pd.DataFrame,
    products: pd.DataFrame,
    cycle_date: pd.Timestamp,
    horizon: int,
    period: str,
) -> pd.DataFrame:
    """Active parents without a child in the forecast, and forecast parents without any child.

    The active parents come from the master data, not from the forecast: a
    product x site is active when one of its customer spans, intersected with
    its product's span (`products`) and the horizon, holds at least one
    period. Each must have rows in `parent_forecast` and at least one child
    in `statistical_forecast`; a parent with forecast rows but no child row
    fails too. Rows: the parent, its active spans, the children and parent
    periods found in the forecast, and why it fails.

    The parents are first judged on integer codes of their keys; only the rows of those in doubt are judged again
    below (every count is a count per parent, so theirs are those of the whole tables), and with none in doubt
    none, which gives the same empty table.
    """
    active = _active_spans(spans, products, cycle_date, horizon, period)
    doubt = _parents_in_doubt(parent, leaf, spans.loc[active, PARENT])
    if doubt is not None:
        in_doubt = _of_parents(spans, doubt)
        parent, leaf, spans, active = parent[_of_parents(parent, doubt)], leaf[_of_parents(leaf, doubt)], \
            spans[in_doubt], active[in_doubt]
    return _parents_without_children(parent, leaf, spans, active)


def _active_spans(spans, products, cycle_date, horizon, period) -> np.ndarray:
    """True on each span that, intersected with its product's span and the horizon, holds a period."""
    cycle_ord = int(period_ordinal(pd.DatetimeIndex([cycle_date]), period)[0])
    s_from, s_to = span_bounds(spans, period)
    p_from, p_to = span_bounds(products, period)
    pos = lookup(spans, ["product"], products.drop_duplicates("product"))
    known = pos >= 0
    at = np.clip(pos, 0, None)
    first = np.fmax(np.fmax(s_from, np.where(known, p_from[at], np.nan)), cycle_ord)
    last = np.fmin(np.fmin(s_to, np.where(known, p_to[at], np.nan)), cycle_ord + horizon - 1)
    return known & (first <= last)


def _parents_in_doubt(parent: pd.DataFrame, leaf: pd.DataFrame, active: pd.DataFrame) -> pd.DataFrame | None:
    """The parent keys that may fail `find_active_parents_without_children`, judged on integer codes of the keys
    (a parent of an active span, `active`, without forecast rows or children, or with rows and no children);
    None where the keys hold a blank (then every row is judged)."""
    kids = _distinct_leaves(leaf)
    frames = [active, kids.loc[kids["customer"].notna(), PARENT], parent[PARENT]]
    keys = pd.concat(frames, ignore_index=True)
    if any(any_blank(keys[c]) for c in PARENT):
        return None
    code, uniques = factorize(keys, PARENT)
    bounds = np.cumsum([0] + [len(f) for f in frames])
    active, children, periods = (
        np.bincount(code[bounds[i]:bounds[i + 1]], minlength=len(uniques)) > 0 for i in range(3)
    )
    return uniques[(active & ~periods) | (active & ~children) | (periods & ~children)]


def _of_parents(frame: pd.DataFrame, parents: pd.DataFrame) -> np.ndarray:
    """True on the rows of `frame` whose parent key is one of `parents`."""
    if parents.empty:
        return np.zeros(len(frame), dtype=bool)
    return pd.MultiIndex.from_frame(frame[PARENT]).isin(pd.MultiIndex.from_frame(parents))


def _parents_without_children(parent, leaf, spans, active: np.ndarray) -> pd.DataFrame:
    """`find_active_parents_without_children` judged on every row given (active: `_active_spans` of `spans`)."""
    expected = spans.loc[active].groupby(PARENT, sort=True).size().rename("active_spans")
    children = _distinct_leaves(leaf).groupby(PARENT, sort=True)["customer"].nunique().rename("children_in_forecast")
    periods = parent.groupby(PARENT, sort=True).size().rename("parent_periods")
    out = pd.concat([expected, children, periods], axis=1).fillna(0).astype(np.int64)
    why = np.select(
        [
            (out["active_spans"] > 0) & (out["parent_periods"] == 0),
            (out["active_spans"] > 0) & (out["children_in_forecast"] == 0),
            (out["parent_periods"] > 0) & (out["children_in_forecast"] == 0),
        ],
        [
            "active in the master data, no row in parent_forecast",
            "active in the master data, no child in statistical_forecast",
            "forecast parent without a child in statistical_forecast",
        ],
        "",
    )
    out["why"] = why
    return out[why != ""].reset_index()


def _distinct_leaves(leaf: pd.DataFrame) -> pd.DataFrame:
    """The leaf keys of `leaf` at the starts of its runs of one key object (`text_codes.run_starts`: a leaf's
    horizon periods share them): every distinct key is kept, so a count of distinct customers per parent is
    that of the whole table."""
    keys = [leaf[c].to_numpy(object) for c in LEAF]
    starts = run_starts(keys)
    return pd.DataFrame({c: k[starts] for c, k in zip(LEAF, keys, strict=True)})


def find_unaccounted_lines(
    raw: pd.DataFrame, cleaned: pd.DataFrame, rejected: pd.DataFrame, *, cleaned_runs=RUNS_UNSEEN,
    raw_runs=RUNS_UNSEEN,
) -> pd.DataFrame:
    """Raw lines that are neither summed into cleaned_history nor rejected, or counted twice, by series.

    The counts are proven on integer codes first (`history_proofs.accounted_lines`; `cleaned_runs`: the
    caller's `history_proofs.leaf_runs(cleaned)`, when it has them, and `raw_runs` the raw lines'); only the rows of the
    series whose counts differ are then grouped by their text keys, which names them as the whole tables would.
    Every raw line (source_file, source_row) is either rejected (a row of
    `rejected` naming it) or used; the used lines of a product x site x
    customer (keys as written) must be the `lines` cleaned_history summed for
    it. Rows: a rejected row naming no raw line or a line twice
    (source_file, source_row), or a series whose counts differ (its keys,
    raw_lines, rejected_lines, used_lines = raw - rejected, cleaned_lines).
    """
    line = ["source_file", "source_row"]
    fast = accounted_lines(raw, cleaned, rejected, cleaned_runs, raw_runs)  # on integer codes; None: every row coded
    if fast is not None:
        no_line, named_before, in_rejected, raw_off, cleaned_off = fast
        raw, in_rejected, cleaned = raw.loc[raw_off], in_rejected[raw_off], cleaned.loc[cleaned_off]
    else:
        raw_ids = pd.MultiIndex.from_frame(raw[line].astype({"source_row": np.int64}))
        rej_ids = pd.MultiIndex.from_frame(rejected[line].astype({"source_row": np.int64}))
        no_line, named_before = ~rej_ids.isin(raw_ids), rej_ids.duplicated(keep="first")
        in_rejected = raw_ids.isin(rej_ids)
    unknown = rejected.loc[no_line, line + LEAF].assign(why="rejected row is no raw line")
    twice = rejected.loc[named_before, line + LEAF].assign(why="raw line rejected twice")
    per_series = pd.concat(
        [
            raw.groupby(LEAF, sort=True).size().rename("raw_lines"),
            raw.loc[in_rejected].groupby(LEAF, sort=True).size().rename("rejected_lines"),
            cleaned.groupby(LEAF, sort=True, observed=True)["lines"].sum().rename("cleaned_lines"),
        ],
        axis=1,
    ).fillna(0).astype(np.int64)
    per_series["used_lines"] = per_series["raw_lines"] - per_series["rejected_lines"]
    off = per_series[per_series["used_lines"] != per_series["cleaned_lines"]].reset_index()
    off["why"] = "used lines of the series differ from the lines cleaned_history summed"
    rows = [f for f in (unknown, twice, off) if len(f)]
    if not rows:
        return off.iloc[0:0]
    return pd.concat(rows, ignore_index=True)
