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
from pipelines.engines.compensated import group_sizes_and_sums
from pipelines.engines.leaf_runs import LeafRuns, expand, leaf_runs, span_rows, take_history, time_key
from pipelines.errors import LifecycleError
from pipelines.keys import ID_DTYPE, LEAF, LEAF_ID, PARENT_ID, factorize, lookup
from pipelines.results import Log, StageResult, quiet
from pipelines.text_codes import codes_of

HISTORY_COLUMNS = LEAF + ["period_start", "quantity", "origin", "source_product", "source_customer", "shortage"]
AUDIT_COLUMNS = LEAF + ["rule", "periods", "quantity", "detail"]


@dataclass(frozen=True)
class LifecycleResult:
    history: pd.DataFrame
    audit: pd.DataFrame
    # (leaf_id, parent_id) of each history row: `keys.key_ids(history)`, from the ranks of the keys kept
    ids: tuple[np.ndarray, np.ndarray] | None = None
    # rows and quantity per origin (rows of ORIGINS; pandas' grouped sum in row order), and the shortage rows,
    # added up while the rows were taken
    origin_totals: tuple[np.ndarray, np.ndarray] | None = None
    shortage_rows: int | None = None


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


def _audit(keys: pd.DataFrame, key_of_row: np.ndarray, key_code: np.ndarray, quantity: np.ndarray, rule: str,
           words: np.ndarray, word_of_row: np.ndarray | None = None) -> pd.DataFrame:
    """Audit rows of history lines grouped by their text key and detail, in the order of both, as
    `groupby(LEAF + ["detail"], sort=True).agg(periods="size", quantity="sum")` of every line gives them: the
    lines' groups numbered on integers (`key_code`: each row of `keys` numbered by its text key; `words`: the
    details, `word_of_row` each line's, or the one detail of every line), the sizes and pandas' grouped sums
    made in one compiled pass in line order, and only the groups' keys sorted as text.

    keys: the keys a line may be kept under; key_of_row: each line's row of `keys`; quantity: each line's."""
    if not len(key_of_row):
        return pd.DataFrame(columns=AUDIT_COLUMNS)
    word = np.zeros(len(key_of_row), np.int64) if word_of_row is None else word_of_row.astype(np.int64)
    group, _ = pd.factorize(key_code[key_of_row].astype(np.int64) * len(words) + word)
    periods, total, first = group_sizes_and_sums(group, np.ascontiguousarray(quantity, dtype=np.float64),
                                                 int(group.max()) + 1)
    out = keys.iloc[key_of_row[first]][LEAF].reset_index(drop=True)
    out["detail"] = words[word[first]]
    out = out.assign(periods=periods, quantity=total).sort_values(LEAF + ["detail"], kind="stable")
    out["rule"] = rule
    return out[AUDIT_COLUMNS].reset_index(drop=True)


def _words(prefix: str, names: np.ndarray, of_row: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(the details `prefix + name` of the names the lines hold, each line's detail among them): one text per
    name held, not per line."""
    held, word_of_row = np.unique(of_row, return_inverse=True)
    return (prefix + names[held]).astype(object), word_of_row.reshape(-1)


ORIGINS = np.array(["own", "successor"], dtype=object)


@dataclass(frozen=True)
class _Pieces:
    """The result's rows as ranges of run positions, in its order: start, length, leaf (the source) and the
    rank of the key they are kept under."""

    start: np.ndarray
    length: np.ndarray
    leaf: np.ndarray
    rank: np.ndarray


def _pieces(runs: LeafRuns, kept: np.ndarray, inside: np.ndarray, length: np.ndarray, rank: np.ndarray,
            moved: np.ndarray, starts: np.ndarray, source_rank: np.ndarray) -> _Pieces:
    """The ranges of the leaves `kept` ordered by their key's `rank`; a key several leaves' ranges reach (a
    leaf and the history moved to it) as its rows one by one, sorted by period, origin (own first), source
    product (`source_rank` of the leaf) and row, as the stable sort of every row would order them."""
    shared = np.bincount(rank[kept])[rank[kept]] > 1
    whole, merged = kept[~shared], kept[shared]
    at = expand(inside[merged], length[merged])
    leaf = np.repeat(merged, length[merged])
    row = runs.rows(at)
    by = np.lexsort((row, source_rank[leaf], moved[leaf], time_key(starts[row]), rank[leaf]))
    start = np.concatenate([inside[whole], at[by]])
    leaf = np.concatenate([whole, leaf[by]])
    ones = np.ones(len(at), dtype=length.dtype)
    by = np.argsort(rank[leaf], kind="stable")
    return _Pieces(start[by], np.concatenate([length[whole], ones])[by], leaf[by], rank[leaf][by])


def apply_lifecycle(
    cleaned: pd.DataFrame, products: pd.DataFrame, spans: pd.DataFrame, config: PlanningConfig, cycle_date: pd.Timestamp
) -> LifecycleResult:
    """Apply the rules of this module to the cleaned history.

    Every rule is decided per leaf, and what it keeps or drops of a leaf is one range of the leaf's rows: the
    history is read as one run of rows per leaf in period order (`leaf_runs`; as the cleaned history holds
    it, else through one sort), so the rows inside a span are one range, found by a binary search of every
    leaf at once. The rows reach the result once, by one index into the history built from the ranges of
    the leaves in key order (the text keys ranked on their distinct values only); the key, origin, source
    and ids of a range are repeated along it. The order is that of a stable sort by leaf, period, origin
    (own first) and source product: a leaf's own range is in it already, and only a leaf that takes a
    retired product's history has its few rows sorted.
    """
    period = config.calendar.period
    cycle_ord = int(period_ordinal(pd.DatetimeIndex([cycle_date]), period)[0])
    quantity = cleaned["quantity"].to_numpy(dtype=float)
    starts = cleaned["period_start"].to_numpy()
    shortage = cleaned["shortage"].to_numpy(bool) if "shortage" in cleaned.columns else np.zeros(len(cleaned), bool)
    s_from, s_to = span_bounds(spans, period)
    runs = leaf_runs(cleaned, starts)
    leaves, n_leaves, every = runs.leaves, len(runs.leaves), np.arange(len(runs.leaves))
    audits = []

    def audit(rule: str, at: np.ndarray, detail: str | tuple[np.ndarray, np.ndarray], key_of_row: np.ndarray,
              keys: pd.DataFrame = leaves, key_code: np.ndarray | None = None) -> None:
        """The audit rows of the history rows at positions `at`, each kept under its row of `keys` (`key_of_row`;
        `key_code`: those rows numbered by their text key, default: each its own, as the leaves are); detail: one
        text, or (the texts, each row's text among them)."""
        words, word_of_row = (np.array([detail], dtype=object), None) if isinstance(detail, str) else detail
        code = np.arange(len(keys)) if key_code is None else key_code
        audits.append(_audit(keys, key_of_row, code, quantity[at], rule, words, word_of_row))

    # --- per leaf: the range of its rows inside its span, [inside, after)
    leaf_span = lookup(leaves, LEAF, spans)
    inside, after = span_rows(runs, leaf_span, s_from, s_to, lambda at: period_ordinal(starts[runs.rows(at)], period))
    at, leaf = runs.rows_of_ranges([runs.first, after], [inside - runs.first, runs.end - after], [every, every])
    audit("outside_active_span", at, "history outside the customer's active span", leaf)

    # --- retired products: dropped, or moved to the end of the successor chain when the customer has a span there
    p_from, p_to = span_bounds(products, period)
    retired_products = products.loc[~np.isnan(p_to) & (p_to < cycle_ord), "product"]
    leaf_retired = leaves["product"].isin(retired_products).to_numpy()
    leaf_target = leaves["product"].map(resolve_successors(products)).where(leaf_retired)
    targets = np.flatnonzero(leaf_target.notna().to_numpy())  # leaves whose history moves; their new keys
    target_keys = leaves.iloc[targets].assign(product=leaf_target.iloc[targets].astype(str).to_numpy())
    target_keys = target_keys.reset_index(drop=True)
    tpos = lookup(target_keys, LEAF, spans) if len(targets) else np.zeros(0, dtype=np.int64)
    horizon_end = cycle_ord + config.calendar.horizon - 1
    t_from, t_to = s_from[np.clip(tpos, 0, None)], s_to[np.clip(tpos, 0, None)]
    with np.errstate(invalid="ignore"):
        t_ok = (tpos >= 0) & (np.isnan(t_from) | (t_from <= horizon_end)) & (np.isnan(t_to) | (t_to >= cycle_ord))
    target_of_leaf = np.full(n_leaves, -1, dtype=np.int64)
    target_of_leaf[targets] = np.arange(len(targets))
    lost, moved = np.zeros(n_leaves, dtype=bool), np.zeros(n_leaves, dtype=bool)
    lost[targets], moved[targets] = ~t_ok, t_ok
    length = after - inside

    def ranges_of(which: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        return runs.rows_of_ranges([inside[which]], [length[which]], [every[which]])

    at, leaf = ranges_of(leaf_retired & (target_of_leaf < 0))
    audit("retired_product_without_successor", at, "product retired before the cycle date", leaf)
    successor_of = target_keys["product"].to_numpy(dtype=object)
    at, leaf = ranges_of(lost)
    audit(
        "successor_without_span",
        at,
        _words("customer has no span active in the horizon on successor ", successor_of, target_of_leaf[leaf]),
        leaf,
    )
    source_product = leaves["product"].to_numpy(dtype=object)
    at, leaf = ranges_of(moved)
    target_code = factorize(target_keys, LEAF)[0] if len(target_keys) else np.zeros(0, np.int64)
    audit(
        "successor_history_mapped", at, _words("history of retired product ", source_product, leaf),
        target_of_leaf[leaf], target_keys, target_code,
    )

    # --- the ranges kept, own or moved, each under its key: a leaf (0..n_leaves-1) or a target key after them
    all_keys = pd.concat([leaves, target_keys], ignore_index=True)
    key_of_leaf = np.where(moved, n_leaves + target_of_leaf, every)
    span_of_key = np.concatenate([leaf_span, tpos])
    key_end = np.where(span_of_key >= 0, s_to[np.clip(span_of_key, 0, None)] if len(s_to) else np.nan, np.nan)
    phased_out = (~np.isnan(key_end) & (key_end < cycle_ord))[key_of_leaf]  # per key, not per row
    kept = (~leaf_retired | moved) & (length > 0)
    own_out, moved_out = kept & phased_out & ~moved, kept & phased_out & moved
    at_own, leaf_own = ranges_of(own_out)
    at_moved, leaf_moved = ranges_of(moved_out)
    key_code, distinct = factorize(all_keys, LEAF)  # a moved history's key may be a leaf's own
    audit(
        "phased_out_before_cycle", np.concatenate([at_own, at_moved]), "customer span ended before the cycle date",
        key_of_leaf[np.concatenate([leaf_own, leaf_moved])], all_keys, key_code,
    )
    kept &= ~phased_out

    # --- the result: the kept ranges by key (as text), each key's rows by period, origin and source product
    rank = np.empty(len(distinct), dtype=np.int64)
    rank[distinct.sort_values(LEAF, kind="stable").index.to_numpy()] = np.arange(len(distinct))
    pieces = _pieces(runs, np.flatnonzero(kept), inside, length, rank[key_code][key_of_leaf], moved, starts,
                     pd.factorize(source_product, sort=True)[0])
    moved_code = moved[pieces.leaf].view(np.int8)
    out = {c: np.repeat(all_keys[c].to_numpy()[key_of_leaf[pieces.leaf]], pieces.length) for c in LEAF}
    out["origin"] = np.repeat(ORIGINS[moved_code], pieces.length)
    out["source_product"] = np.repeat(source_product[pieces.leaf], pieces.length)
    # a moved history keeps its site and customer (only the product changes): the source customer of every row
    # is its customer, so the column is the customer column's array itself (both only read from here on)
    out["source_customer"] = out["customer"]
    ranked = distinct.iloc[np.argsort(rank)].reset_index(drop=True)
    leaf_id, parent_id = _ids_of_ranks(pieces.rank, ranked)
    rows = take_history(runs, pieces.start, pieces.length, starts, quantity, shortage, leaf_id, parent_id,
                        moved_code, len(ORIGINS))
    out["period_start"], out["quantity"], out["shortage"] = rows.starts, rows.quantity, rows.shortage
    audit_frame = _stack(audits, AUDIT_COLUMNS).astype({"periods": np.int64, "quantity": float})
    # the new columns become the frame as they are (the default would copy each into consolidated blocks)
    history = pd.DataFrame({c: out.pop(c) for c in HISTORY_COLUMNS}, copy=False)
    return LifecycleResult(history, audit_frame.reset_index(drop=True), (rows.leaf_id, rows.parent_id),
                           (rows.group_rows, rows.group_sums), rows.shortage_rows)


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
    audit = result.audit
    # with the leaf and parent ids the later stages carry (a frame of the same arrays: setting a column copies it)
    columns = {c: result.history[c].to_numpy() for c in result.history.columns}
    history = pd.DataFrame(columns | dict(zip((LEAF_ID, PARENT_ID), result.ids, strict=True)), copy=False)
    by_rule = audit.groupby("rule").agg(
        leaves=("customer", "size"), periods=("periods", "sum"), quantity=("quantity", "sum")
    )
    by_origin = _by_origin(history, result.origin_totals)
    shortage_rows = int(history["shortage"].sum()) if result.shortage_rows is None else result.shortage_rows
    return StageResult(
        outputs={"lifecycle_history": history, "lifecycle_audit": audit},
        metadata={
            "lifecycle_history": {
                "by_origin": by_origin,
                "shortage_rows": shortage_rows,
            },
            "lifecycle_audit": {"by_rule": by_rule.reset_index()},
        },
    )


def _by_origin(history: pd.DataFrame, origin_totals: tuple[np.ndarray, np.ndarray] | None = None) -> pd.DataFrame:
    """Rows and quantity per origin, as `groupby("origin").agg(...).reset_index()` (the same sums: pandas'
    grouped sum, in row order): `origin_totals` (rows and sums per row of ORIGINS, added up by the stage while
    it took the rows: no pass over the history here), else grouped on `text_codes.codes_of` of the column."""
    if origin_totals is not None:
        rows, sums = origin_totals
        origins = ORIGINS
        held = np.flatnonzero(rows)
        sums = sums[held]
    else:
        quantity = history["quantity"].to_numpy(float)
        code, origins = codes_of(history["origin"])
        groups = pd.Categorical.from_codes(code, categories=np.arange(len(origins)))  # -1: missing, left out
        grouped = pd.Series(quantity).groupby(groups, observed=True, sort=True).sum()
        held = grouped.index.to_numpy(np.int64)
        rows = np.bincount(code[code >= 0], minlength=len(origins))
        sums = grouped.to_numpy(float)
    out = pd.DataFrame({"origin": origins[held], "rows": rows[held].astype(np.int64), "quantity": sums})
    return out.sort_values("origin", kind="stable").reset_index(drop=True)
