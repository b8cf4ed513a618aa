"""Stage 3, `lifecycle_history`: the history a share may be computed from.

Rules, in the order they run (each one's moved or dropped quantity is a row of
`lifecycle_audit`, so nothing leaves the history unexplained):

1. `outside_active_span` - a line outside its customer's span (before
   `active_from` or after `active_to`) is dropped.
2. Retired products (product `active_to` before the cycle date):
   `successor_history_mapped` - with a successor, the history moves to the end
   of the successor chain (A -> B -> C goes to C) for the same site and
   customer, kept as separate rows with `origin = successor`;
   `successor_without_span` - dropped when that customer has no span on the
   successor active in any period of the horizon; `retired_product_without_successor` -
   dropped when there is no successor.
3. `phased_out_before_cycle` - a customer whose span ends before the cycle
   date leaves the share basis: its history is dropped here.

Every row carries `shortage` from cleaned history (False where the input has no
such column): a recorded supply shortage of the source product x site x
period. Shares and the parent baseline leave such periods out.

New customers are not given anyone else's history here: `active_children`
counts each child's own periods, and the share table decides a new
customer's share (from its reference customer, a planner-given initial share,
or none yet), see `pipelines.stages.share_tables`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from pipelines.calendar import period_ordinal, span_bounds
from pipelines.config import CalendarConfig, PlanningConfig
from pipelines.errors import LifecycleError
from pipelines.keys import ID_DTYPE, LEAF, LEAF_ID, PARENT_ID, factorize, lookup, pack_codes
from pipelines.results import Log, StageResult, quiet
from pipelines.text_codes import codes_of

HISTORY_COLUMNS = LEAF + ["period_start", "quantity", "origin", "source_product", "source_customer", "shortage"]
AUDIT_COLUMNS = LEAF + ["rule", "periods", "quantity", "detail"]
DAY_NS = 86_400 * 10**9


@dataclass(frozen=True)
class LifecycleResult:
    history: pd.DataFrame
    audit: pd.DataFrame
    # (leaf_id, parent_id) of each history row: `keys.key_ids(history)`, from the ranks the sort already made
    ids: tuple[np.ndarray, np.ndarray] | None = None


def resolve_successors(products: pd.DataFrame) -> pd.Series:
    """Final successor of every product that names one (A -> B -> C gives A: C, B: C).

    Raises LifecycleError naming the products when a successor is unknown or the
    chain loops back on itself.
    """
    step = products.set_index("product")["successor"].dropna()
    unknown = step[~step.isin(products["product"])]
    if len(unknown):
        pairs = ", ".join(f"{p} -> {s}" for p, s in unknown.items())
        raise LifecycleError(
            f"products: successor not in the product master: {pairs}. "
            f"Add the successor product or clear the successor cell."
        )
    final = step.copy()
    for _ in range(len(step) + 1):
        nxt = final.map(step)
        if nxt.isna().all():
            return final
        final = nxt.fillna(final)
    looping = sorted(final.index[final.map(step).notna()])
    raise LifecycleError(
        f"products: the successor chain loops through {looping}; each chain must end at a product without successor."
    )


def _stack(frames: list[pd.DataFrame], columns: list[str] | None = None) -> pd.DataFrame:
    """Concatenate the non-empty frames (the first frame, empty or not, if all are empty)."""
    full = [f for f in frames if len(f)]
    if not full:
        return frames[0].iloc[0:0] if frames and columns is None else pd.DataFrame(columns=columns)
    return pd.concat(full, ignore_index=True)


def _audit(rows: pd.DataFrame, rule: str, detail: str | pd.Series) -> pd.DataFrame:
    """Audit rows for `rows` (history lines) grouped by leaf."""
    if rows.empty:
        return pd.DataFrame(columns=AUDIT_COLUMNS)
    g = rows.assign(detail=detail).groupby(LEAF + ["detail"], sort=True, observed=True)["quantity"]
    out = g.agg(periods="size", quantity="sum").reset_index()
    out["rule"] = rule
    return out[AUDIT_COLUMNS]


def _index_type(n: int) -> type:
    """int32 for positions and codes below 2**31 (half the memory of int64), else int64."""
    return np.int32 if n < 2**31 - 1 else np.int64


def leaf_codes(frame: pd.DataFrame) -> tuple[np.ndarray, pd.DataFrame]:
    """`keys.factorize(frame, LEAF)`: codes by first appearance (in the smallest integer type) and the leaves.

    The cleaned history holds each leaf's periods one after another, so factorize hashes only the first row
    of each run of one key object (`text_codes.run_starts`: about one row per leaf), not every row.
    """
    codes, leaves = factorize(frame, LEAF)
    return codes.astype(_index_type(len(leaves))), leaves


def _inside_span(
    leaf: np.ndarray, leaf_span: np.ndarray, s_from: np.ndarray, s_to: np.ndarray, ordinal: np.ndarray
) -> np.ndarray:
    """Per row: its leaf has a span (`leaf_span`: row of the spans, -1: none) whose bounds (`s_from`, `s_to`:
    period ordinals, NaN = open) hold the row's period `ordinal`, as `calendar.active_mask`. The bounds are
    made integers per leaf (an open bound the extreme integer, a leaf without a span an empty range), so the
    rows see one comparison per bound."""
    at = np.clip(leaf_span, 0, None)
    low, high = np.iinfo(np.int64).min, np.iinfo(np.int64).max
    lo, hi = np.nan_to_num(s_from[at]).astype(np.int64), np.nan_to_num(s_to[at]).astype(np.int64)
    lo[np.isnan(s_from[at])], hi[np.isnan(s_to[at])] = low, high  # (an int64 bound never passes through float)
    lo[leaf_span < 0], hi[leaf_span < 0] = high, low
    inside = ordinal >= lo[leaf]
    inside &= ordinal <= hi[leaf]
    return inside


def _day_rank(starts: np.ndarray) -> np.ndarray:
    """A sort key of each row's period start, equal exactly where the starts are: whole days since the epoch
    where every start is a midnight (as the stage writes them), else the rank among the distinct starts."""
    if starts.dtype == "datetime64[ns]" and not np.isnat(starts).any():
        ns = starts.view(np.int64)
        days, rest = np.divmod(ns, DAY_NS)
        if not rest.any():
            return days
    return pd.factorize(starts, sort=True)[0].astype(np.int32)


def _sort_order(dest_rank: np.ndarray, ordinal: np.ndarray, moved: np.ndarray, source_rank: np.ndarray) -> np.ndarray:
    """Stable order by destination leaf rank, period, origin (own first) and source product rank.

    One packed int64 key and one stable argsort where the four fit in 62 bits
    (they do far beyond a million leaves), else np.lexsort on the four.
    """
    if len(dest_rank) == 0:
        return np.zeros(0, dtype=np.int64)
    ordinal = ordinal - ordinal.min()
    sizes = [int(dest_rank.max()) + 1, int(ordinal.max()) + 1, 2, int(source_rank.max()) + 1]
    key = pack_codes([dest_rank, ordinal, moved, source_rank], sizes)
    if key is None:
        return np.lexsort((source_rank, moved, ordinal, dest_rank))
    return np.argsort(key, kind="stable")


def apply_lifecycle(
    cleaned: pd.DataFrame, products: pd.DataFrame, spans: pd.DataFrame, config: PlanningConfig, cycle_date: pd.Timestamp
) -> LifecycleResult:
    """Apply the rules of this module to the cleaned history.

    The rules are decided once per leaf (its span, its product's retirement and
    successor, the successor's span) and reach the rows through integer leaf
    codes; the history is never copied whole: its columns are read by row
    positions into the sorted result, whose order is that of a stable sort by
    leaf, period, origin and source product (the leaves and products ranked as
    text, on their distinct values only; one packed integer key).
    """
    period = config.calendar.period
    cycle_ord = int(period_ordinal(pd.DatetimeIndex([cycle_date]), period)[0])
    quantity = cleaned["quantity"].to_numpy(dtype=float)
    starts = cleaned["period_start"].to_numpy()
    n_rows = len(cleaned)
    shortage = cleaned["shortage"].to_numpy(bool) if "shortage" in cleaned.columns else np.zeros(n_rows, dtype=bool)
    h_ord = period_ordinal(cleaned["period_start"], period)
    s_from, s_to = span_bounds(spans, period)
    audits = []

    # --- per leaf: its span, and where its product is retired, the successor's leaf and span
    leaf, leaves = leaf_codes(cleaned)

    def rows_of(at: np.ndarray, keys: pd.DataFrame = leaves, key_of_row: np.ndarray | None = None) -> pd.DataFrame:
        """The keys and quantity of the rows at positions `at` (an audit's input); keys of their own leaf unless
        `key_of_row` gives each row's row of `keys`."""
        return (
            keys.iloc[leaf[at] if key_of_row is None else key_of_row]
            .reset_index(drop=True)
            .assign(quantity=quantity[at])
        )

    leaf_span = lookup(leaves, LEAF, spans)
    inside = _inside_span(leaf, leaf_span, s_from, s_to, h_ord)
    del h_ord
    audits.append(
        _audit(rows_of(np.flatnonzero(~inside)), "outside_active_span", "history outside the customer's active span")
    )

    p_from, p_to = span_bounds(products, period)
    retired_products = products.loc[~np.isnan(p_to) & (p_to < cycle_ord), "product"]
    successor = resolve_successors(products)
    leaf_retired = leaves["product"].isin(retired_products).to_numpy()
    leaf_target = leaves["product"].map(successor).where(leaf_retired)
    leaf_has_target = leaf_target.notna().to_numpy()
    retired = inside & leaf_retired[leaf]
    no_successor = retired & ~leaf_has_target[leaf]
    audits.append(
        _audit(
            rows_of(np.flatnonzero(no_successor)),
            "retired_product_without_successor",
            "product retired before the cycle date",
        )
    )

    targets = np.flatnonzero(leaf_has_target)  # leaves whose history moves; their new keys
    target_keys = leaves.iloc[targets].assign(product=leaf_target.iloc[targets].astype(str).to_numpy())
    target_keys = target_keys.reset_index(drop=True)
    tpos = lookup(target_keys, LEAF, spans) if len(targets) else np.zeros(0, dtype=np.int64)
    horizon_end = cycle_ord + config.calendar.horizon - 1
    t_from, t_to = s_from[np.clip(tpos, 0, None)], s_to[np.clip(tpos, 0, None)]
    with np.errstate(invalid="ignore"):
        t_ok = (tpos >= 0) & (np.isnan(t_from) | (t_from <= horizon_end)) & (np.isnan(t_to) | (t_to >= cycle_ord))
    target_of_leaf = np.full(len(leaves), -1, dtype=_index_type(2 * len(leaves)))
    target_of_leaf[targets] = np.arange(len(targets))
    moving = retired & ~no_successor
    moving_rows = np.flatnonzero(moving).astype(_index_type(n_rows))
    row_target = target_of_leaf[leaf[moving_rows]]  # per moving row: its successor key
    lost = ~t_ok[row_target] if len(targets) else np.zeros(0, dtype=bool)
    audits.append(
        _audit(
            rows_of(moving_rows[lost]),
            "successor_without_span",
            "customer has no span active in the horizon on successor "
            + target_keys["product"].to_numpy(dtype=object)[row_target[lost]],
        )
    )
    moved_rows, moved_target = moving_rows[~lost], row_target[~lost]
    audits.append(
        _audit(
            rows_of(moved_rows, target_keys, moved_target),
            "successor_history_mapped",
            "history of retired product " + leaves["product"].to_numpy(dtype=object)[leaf[moved_rows]],
        )
    )

    # --- the rows kept, own then moved (the order the stable sort keeps among equals); phased-out leaves leave
    own_rows = np.flatnonzero(inside & ~retired).astype(_index_type(n_rows))
    del inside, retired, no_successor, moving
    rows = np.concatenate([own_rows, moved_rows])
    is_moved = np.concatenate([np.zeros(len(own_rows), dtype=bool), np.ones(len(moved_rows), dtype=bool)])
    key = np.concatenate([leaf[own_rows], len(leaves) + moved_target])  # into own leaves, then target keys
    del own_rows
    key_end = s_to[np.concatenate([leaf_span, tpos])]
    key_phased_out = ~np.isnan(key_end) & (key_end < cycle_ord)  # per key, not per row
    phased_out = key_phased_out[key]
    all_keys = pd.concat([leaves, target_keys], ignore_index=True)
    audits.append(
        _audit(
            rows_of(rows[phased_out], all_keys, key[phased_out]),
            "phased_out_before_cycle",
            "customer span ended before the cycle date",
        )
    )
    rows, is_moved, key = rows[~phased_out], is_moved[~phased_out], key[~phased_out]

    # --- sorted by leaf (as text), period, origin ("own" < "successor") and source product (as text)
    key_code, distinct = factorize(all_keys, LEAF)
    rank = np.empty(len(distinct), dtype=np.int64)
    rank[distinct.sort_values(LEAF, kind="stable").index.to_numpy()] = np.arange(len(distinct))
    source_rank = pd.factorize(leaves["product"], sort=True)[0]
    dest_rank = rank[key_code][key]
    order = _sort_order(dest_rank, _day_rank(starts)[rows], is_moved, source_rank[leaf[rows]])
    rows, is_moved, key, dest_rank = rows[order], is_moved[order], key[order], dest_rank[order]
    del order
    ids = _ids_of_ranks(dest_rank, distinct.iloc[np.argsort(rank)].reset_index(drop=True))
    del dest_rank
    source = leaf[rows]
    out = {c: all_keys[c].to_numpy()[key] for c in LEAF}
    out["period_start"] = starts[rows]
    out["quantity"] = quantity[rows]
    out["origin"] = np.array(["own", "successor"], dtype=object)[is_moved.view(np.int8)]
    out["source_product"] = leaves["product"].to_numpy(dtype=object)[source]
    out["source_customer"] = leaves["customer"].to_numpy(dtype=object)[source]
    out["shortage"] = shortage[rows]
    audit = _stack(audits, AUDIT_COLUMNS)
    audit = audit.astype({"periods": np.int64, "quantity": float})
    # the new columns become the frame as they are (the default would copy each into consolidated blocks)
    history = pd.DataFrame({c: out.pop(c) for c in HISTORY_COLUMNS}, copy=False)
    return LifecycleResult(history=history, audit=audit.reset_index(drop=True), ids=ids)


def _ids_of_ranks(ranks: np.ndarray, ranked: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """`keys.key_ids` of rows sorted by their leaf's rank in key order (`ranks`; `ranked`: the keys by rank):
    a leaf's id is its place among the leaves present, a parent's among the parents present, both in key order."""
    if not len(ranks):
        return np.zeros(0, ID_DTYPE), np.zeros(0, ID_DTYPE)
    new_leaf = np.ones(len(ranks), dtype=bool)
    new_leaf[1:] = ranks[1:] != ranks[:-1]
    leaf_id = np.cumsum(new_leaf) - 1
    present = ranked.iloc[ranks[new_leaf]]
    product, site = present["product"].to_numpy(object), present["site"].to_numpy(object)
    new_parent = np.ones(len(present), dtype=bool)
    new_parent[1:] = (product[1:] != product[:-1]) | (site[1:] != site[:-1])
    parent_of_leaf = np.cumsum(new_parent) - 1
    return leaf_id.astype(ID_DTYPE), parent_of_leaf[leaf_id].astype(ID_DTYPE)


@dataclass(frozen=True)
class LifecycleSettings:
    """What the lifecycle stage reads: the calendar (period and horizon)."""

    calendar: CalendarConfig

    @classmethod
    def of(cls, config: PlanningConfig) -> LifecycleSettings:
        return cls(calendar=config.calendar)


def run(
    cleaned_history: pd.DataFrame,
    products: pd.DataFrame,
    customer_spans: pd.DataFrame,
    cycle_calendar: pd.DataFrame,
    settings: LifecycleSettings,
    log: Log = quiet,
) -> StageResult:
    """lifecycle_history and lifecycle_audit, with what each rule moved."""
    cycle_date = pd.Timestamp(cycle_calendar["cycle_date"].iloc[0])
    result = apply_lifecycle(cleaned_history, products, customer_spans, settings, cycle_date)
    history, audit = result.history, result.audit
    history[LEAF_ID], history[PARENT_ID] = result.ids  # the leaf and parent ids the later stages carry
    by_rule = audit.groupby("rule").agg(
        leaves=("customer", "size"), periods=("periods", "sum"), quantity=("quantity", "sum")
    )
    by_origin = _by_origin(history)
    return StageResult(
        outputs={"lifecycle_history": history, "lifecycle_audit": audit},
        metadata={
            "lifecycle_history": {
                "by_origin": by_origin,
                "shortage_rows": int(history["shortage"].sum()),
            },
            "lifecycle_audit": {"by_rule": by_rule.reset_index()},
        },
    )


def _by_origin(history: pd.DataFrame) -> pd.DataFrame:
    """Rows and quantity per origin, as `groupby("origin").agg(...).reset_index()`, grouped on the origin's
    codes (`text_codes.codes_of`: two objects in long runs) instead of hashing every row's text."""
    code, origins = codes_of(history["origin"])
    grouped = history["quantity"].groupby(code, sort=False).agg(["size", "sum"])
    grouped = grouped[grouped.index >= 0]  # a missing origin: left out, as groupby leaves it out
    out = pd.DataFrame(
        {"origin": origins[grouped.index.to_numpy()], "rows": grouped["size"].to_numpy(np.int64),
         "quantity": grouped["sum"].to_numpy(float)}
    )
    return out.sort_values("origin", kind="stable").reset_index(drop=True)
