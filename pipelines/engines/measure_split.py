"""Splitting a parent value over its active children by a rule, with pins kept; and the checks of a split plan.

`split_cells` implements the split rules, pins, overflow and the integer split
of `pipelines.stages.plan_measures` (its docstring states them, with their
sources) on (children x horizon) matrices: group sums are over integer parent
codes, no loop over parents or series. `find_sum_violations` and
`find_pins_not_kept` recompute the accounting from an output table, not from
the split, so a defect of the split shows as failing rows.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
import pandas as pd

from pipelines.calendar import period_ordinal
from pipelines.config_sections import MeasureConfig
from pipelines.engines.integer_split import largest_remainder, round_to_pack
from pipelines.engines.measure_parents import Parents, parent_sum
from pipelines.engines.plan_codes import group_totals, key_sums, rows_holding, rows_of, run_codes
from pipelines.keys import LEAF, PARENT
from pipelines.vocabulary import MeasureFallback, values

PIN_KEY = ["measure"] + LEAF + ["period_start"]
FALLBACKS = values(MeasureFallback)  # none, period_share, even, pins_overflow
NONE, PERIOD_SHARE, EVEN, PINS_OVERFLOW = range(4)
STATUSES = ("split", "pins_overflow", "no_active_child")
SPLIT, OVERFLOW, NO_ACTIVE_CHILD = range(3)
TOLERANCE = 1e-9


@dataclass(frozen=True)
class Split:
    """One measure split over (n_children, H) cells; parent arrays are (n_parents, H).

    value: the leaf values; rows: cells that get a row of the plan; fallback:
    code into FALLBACKS per cell; pins_sum, split_total (what the children
    sum to), status (code into STATUSES) and live (the parent period has a
    value or pins) per parent period.
    """

    value: np.ndarray
    rows: np.ndarray
    fallback: np.ndarray
    pins_sum: np.ndarray
    split_total: np.ndarray
    status: np.ndarray
    live: np.ndarray
    n_active: np.ndarray | None = None  # (n_parents, H) active children of each parent period


def split_cells(
    rule: str,
    parent: np.ndarray,
    has_value: np.ndarray,
    parent_of_child: np.ndarray,
    active: np.ndarray,
    pin: np.ndarray | None = None,
    pinned: np.ndarray | None = None,
    basis: np.ndarray | None = None,
    fallback_basis: np.ndarray | None = None,
    pack_size: int | None = None,
    order: np.ndarray | None = None,
    n_active: np.ndarray | None = None,
) -> Split:
    """Split each parent period's value over its active children by `rule`; see the module docstring.

    parent, has_value (n_parents, H): the parent's value and whether it has
    one. parent_of_child (n,): parent code of each child. active (n, H) bool.
    pin, pinned (n, H): pinned values, only where active. basis (n, H):
    pro_rata weights; fallback_basis (n, H): weights where the basis is 0 for
    every unpinned active child (then even). pack_size: integer split in
    multiples of it. order (n,): tie-break key of the integer split. n_active (n_parents, H): the active
    children of each parent period, when the caller has counted them (the same for every measure).

    A measure without a pin on an active child (most of them) skips the pins' arithmetic: its pin sums are 0,
    every active child is free, and V - 0 is V, so the values are the same. The (n, H) work is done in a
    few buffers reused step by step, each step the same arithmetic on the same values as written out.
    """
    n_parents, h = parent.shape
    n = len(parent_of_child)
    groups = Parents(parent_of_child, n_parents)
    pinned = None if pinned is None else pinned & active
    if pinned is not None and not pinned.any():
        pinned = None  # no pin applies: the split without pins
    if n_active is None:
        n_active = groups.sum(active)
    if pinned is None:
        pin, any_pin, pins_sum = None, np.zeros((n_parents, h), dtype=bool), np.zeros((n_parents, h))
    else:
        pin = np.where(pinned, 0.0 if pin is None else pin, 0.0)
        any_pin = groups.sum(pinned) > 0
        pins_sum = groups.sum(pin)
    live = has_value | any_pin
    v = np.where(has_value, parent, 0.0)
    tol = TOLERANCE * np.maximum(np.abs(v), 1.0)
    fallback = np.zeros((n, h), dtype=np.int8)
    status = np.where(live & (n_active == 0) & (np.abs(v) > tol), NO_ACTIVE_CHILD, SPLIT).astype(np.int8)
    if rule == "replicate":
        value = groups.spread(v)
        rows = active & groups.spread(has_value)
        if pinned is not None:
            np.copyto(value, pin, where=pinned)
            rows |= pinned
        return Split(value, rows, fallback, pins_sum, v, status, live, n_active)

    free = active if pinned is None else active & ~pinned
    n_free = n_active if pinned is None else groups.sum(free)
    rest = v if pinned is None else v - pins_sum  # v - 0 is v: no new values without pins
    direction = np.where(v >= 0, 1.0, -1.0)
    overflow = live & any_pin & ((direction * rest < -tol) | ((n_free == 0) & (np.abs(rest) > tol)))
    if pack_size is not None:
        rest = round_to_pack(rest, pack_size)
    carry = live & ~overflow & (n_free > 0)
    moving = groups.spread(carry & (np.abs(rest) > tol))
    moving &= free

    if rule == "even":
        weight = free.astype(float)
    else:
        weight = _clipped_on(basis, free)
        use_basis = groups.sum(weight) > 0
        use_fallback = np.zeros_like(use_basis)
        if fallback_basis is not None:
            fb = _clipped_on(fallback_basis, free)
            use_fallback = ~use_basis & (groups.sum(fb) > 0)
            take = groups.spread(use_fallback)
            np.copyto(weight, fb, where=take)
            del fb
            take &= moving
            fallback[take] = PERIOD_SHARE
        even = groups.spread(~use_basis & ~use_fallback)
        np.copyto(weight, free, where=even)  # 1.0 on a free child, 0.0 on the others
        even &= moving
        fallback[even] = EVEN
    del moving
    total = groups.spread(groups.sum(weight))

    split_here = groups.spread(carry)
    split_here &= free
    if pack_size is None:
        # share = weight / total where total > 0, else 0; value = rest x share where split here, else 0
        divide = total > 0
        np.divide(weight, total, out=weight, where=divide)
        weight[~divide] = 0.0
        value = groups.spread(rest)
        np.multiply(value, weight, out=value)
        value[~split_here] = 0.0
    else:
        child, period = np.nonzero(split_here)
        units = np.where(carry, np.rint(np.abs(rest) / pack_size), 0.0).ravel()
        key = np.arange(n) if order is None else order
        parts = largest_remainder(units, weight[child, period], parent_of_child[child] * h + period, key[child])
        value = np.zeros((n, h))
        value[child, period] = np.sign(rest[parent_of_child[child], period]) * parts * pack_size
    if pinned is not None:
        np.copyto(value, pin, where=pinned)
        fallback[groups.spread(overflow) & free] = PINS_OVERFLOW
    split_total = np.where(overflow, pins_sum, np.where(status == NO_ACTIVE_CHILD, v, pins_sum + rest))
    status = np.where(overflow, OVERFLOW, status).astype(np.int8)
    rows = active & groups.spread(live)
    return Split(value, rows, fallback, pins_sum, split_total, status, live, n_active)


def _clipped_on(weights: np.ndarray, free: np.ndarray) -> np.ndarray:
    """`np.where(free, np.clip(weights, 0.0, None), 0.0)` in one new array: negative weights count as 0, and
    only free children weigh."""
    out = np.clip(weights, 0.0, None)
    np.copyto(out, 0.0, where=~free)
    return out


def _stack(pieces: list[pd.DataFrame], columns: list[str]) -> pd.DataFrame:
    pieces = [p[columns] for p in pieces if len(p)]
    if not pieces:
        return pd.DataFrame({c: pd.Series(dtype=object) for c in columns})
    return pd.concat(pieces, ignore_index=True)


def find_sum_violations(
    plan: pd.DataFrame, parents: pd.DataFrame, measures: Mapping[str, MeasureConfig]
) -> pd.DataFrame:
    """Parent periods whose leaves do not add up: the rows behind the blocking check measures_sum_to_parent.

    even / pro_rata: the children (pins included) must sum to the parent value
    V, or for an integer measure to sum of pins + p x floor((V - pins) / p +
    1/2); where the pins overflow (warn mode) to the pins alone. A parent
    period with a value and no active child fails. replicate: every unpinned
    child equals the parent and every active child has a row. Tolerance 1e-9
    x max(|expected|, 1). Recomputed from the output table, not taken from
    the split.
    """
    key = ["measure", "product", "site", "period_start"]
    columns = key + ["rule", "parent_value", "expected", "children_sum", "children", "reason"]
    if parents.empty:
        return pd.DataFrame({c: pd.Series(dtype=object) for c in columns})
    sums = key_sums(plan, key)
    at = rows_of(parents, key, sums)  # each parent period's row of sums, -1 where the plan has none
    merged = parents.reset_index(drop=True)
    for column, empty in (("children_sum", 0.0), ("children", 0), ("pins_in_plan", 0.0)):
        merged[column] = np.append(sums[column].to_numpy(), empty)[at]  # at -1: the appended empty value
    v = merged["parent_value"].fillna(0.0).to_numpy(float)
    pins_sum = merged["pins_in_plan"].to_numpy(float)
    pack_of = {n: m.integer.pack_size if m.integer else 0 for n, m in measures.items()}
    pack = merged["measure"].map(pack_of).to_numpy()
    rest = v - pins_sum
    rounded = np.where(pack > 0, round_to_pack(rest, np.where(pack > 0, pack, 1)), rest)
    status = merged["status"].to_numpy(object)
    expected = np.where(status == STATUSES[OVERFLOW], pins_sum, pins_sum + rounded)
    total = merged["children_sum"].to_numpy(float)
    off = np.abs(total - expected) > TOLERANCE * np.maximum(np.abs(expected), 1.0)
    additive = merged["rule"].to_numpy(object) != "replicate"
    reason = np.select(
        [
            additive & (status == STATUSES[NO_ACTIVE_CHILD]),
            additive & off,
            ~additive
            & merged["parent_value"].notna().to_numpy()
            & (merged["children"].to_numpy() != merged["active_children"].to_numpy()),
        ],
        ["no active child carries the value", "children do not sum to the parent", "an active child has no row"],
        "",
    )
    merged["expected"] = np.where(additive, expected, v)
    merged["reason"] = reason
    failing = merged[reason != ""]
    rep = rows_holding(plan, "rule", "replicate")
    rep = rep[~plan["pinned"].to_numpy(bool)[rep]]
    value, parent_value = plan["value"].to_numpy(float)[rep], plan["parent_value"].to_numpy(float)[rep]
    bad = rep[~(np.abs(value - parent_value) <= TOLERANCE * np.maximum(np.abs(parent_value), 1.0))]
    if len(bad):
        bad_parents = plan.iloc[bad].groupby(key, sort=False).size().rename("n").reset_index()
        # the parents in their order with their children's sums (as `merged` holds them)
        extra = merged.merge(bad_parents, on=key)
        extra = extra.assign(expected=extra["parent_value"], reason="a child differs from the parent value")
        failing = pd.concat([failing, extra], ignore_index=True)
    return failing[columns].reset_index(drop=True)


def find_pins_not_kept(plan: pd.DataFrame, pins_applied: pd.DataFrame, pins_not_applied: pd.DataFrame) -> pd.DataFrame:
    """Pins whose leaf does not hold exactly the pinned value: the rows behind the blocking check pins_kept.

    A pin that could not be applied (leaf not active in its period) fails with
    its reason; an applied pin fails when the plan has no pinned row for it or
    its value differs (tolerance 1e-9 x max(|pin|, 1)).
    """
    columns = PIN_KEY + ["pin", "value", "reason"]
    pinned = np.flatnonzero(plan["pinned"].to_numpy(bool))  # a few rows: taken column by column, not a frame mask
    rows = pd.DataFrame({c: plan[c].to_numpy()[pinned] for c in PIN_KEY + ["value"]})
    applied = pins_applied.rename(columns={"value": "pin"}).astype({"period_start": "datetime64[ns]", "pin": float})
    merged = applied.merge(rows.astype({"period_start": "datetime64[ns]"}), on=PIN_KEY, how="left")
    missing = merged["value"].isna()
    off = ~(np.abs(merged["value"] - merged["pin"]) <= TOLERANCE * np.maximum(np.abs(merged["pin"]), 1.0))
    merged["reason"] = np.where(missing, "no pinned row in the plan", "value differs from the pin")
    failing = merged[missing | off]
    not_applied = pins_not_applied.rename(columns={"value": "pin"}).assign(value=np.nan)
    return _stack([failing, not_applied], columns)


def plan_totals(plan: pd.DataFrame, parents: pd.DataFrame) -> pd.DataFrame:
    """Per measure: parent periods, leaf rows, pinned rows, and parent vs leaf totals.

    For replicate measures (values per unit) a sum means nothing; their
    `statistic` is `mean` and the two columns hold the mean parent and leaf value.
    """
    p = parents.groupby(["measure", "rule"], sort=False).agg(
        parent_periods=("period_start", "size"),
        parent_sum=("parent_value", "sum"),
        parent_mean=("parent_value", "mean"),
    )
    coded = run_codes(plan, ["measure", "rule"])  # a measure's rows together: a few runs
    if coded is None:
        leaf = plan.groupby(["measure", "rule"], sort=False).agg(
            leaf_rows=("value", "size"),
            pinned_rows=("pinned", "sum"),
            leaf_sum=("value", "sum"),
            leaf_mean=("value", "mean"),
        )
    else:  # the groups of one integer key numbered by first appearance: the same rows, sums in the same order
        leaf = group_totals(coded[0], len(coded[1]), plan["value"].to_numpy(float), plan["pinned"].to_numpy(bool))
        leaf.index = pd.MultiIndex.from_frame(coded[1])
    out = p.join(leaf, how="outer").reset_index()
    mean = (out["rule"] == "replicate").to_numpy()
    out["statistic"] = np.where(mean, "mean", "total")
    out["parent"] = np.where(mean, out["parent_mean"], out["parent_sum"])
    out["leaf"] = np.where(mean, out["leaf_mean"], out["leaf_sum"])
    out[["parent_periods", "leaf_rows", "pinned_rows"]] = (
        out[["parent_periods", "leaf_rows", "pinned_rows"]].fillna(0).astype(np.int64)
    )
    return out[["measure", "rule", "parent_periods", "leaf_rows", "pinned_rows", "statistic", "parent", "leaf"]]


PARENT_COLUMNS = [
    "measure",
    "rule",
    "product",
    "site",
    "period_start",
    "parent_value",
    "pins_sum",
    "pinned_children",
    "active_children",
    "split_total",
    "status",
]


OVERFLOW_COLUMNS = ["measure", "product", "site", "period_start", "parent_value", "pins_sum", "overflow", "pins"]


def parent_piece(name, m, split, value, has, pinned, active, parents, parent_of_child, starts) -> pd.DataFrame:
    n_parents = len(parents)
    par, col = np.nonzero(split.live)
    n_active = split.n_active
    if n_active is None:
        n_active = parent_sum(active, parent_of_child, n_parents)
    n_pinned = parent_sum(pinned, parent_of_child, n_parents)
    out = parents[PARENT].iloc[par].reset_index(drop=True)
    out.insert(0, "rule", m.rule)
    out.insert(0, "measure", name)
    out["period_start"] = starts[col]
    out["parent_value"] = np.where(has[par, col], value[par, col], np.nan)
    out["pins_sum"] = split.pins_sum[par, col]
    out["pinned_children"] = n_pinned[par, col].astype(np.int64)
    out["active_children"] = n_active[par, col].astype(np.int64)
    out["split_total"] = split.split_total[par, col]
    out["status"] = np.asarray(STATUSES, dtype=object)[split.status[par, col]]
    return out


def orphan_parents(
    rows: pd.DataFrame, name: str, m: MeasureConfig, period: str, first_ord: int, starts
) -> pd.DataFrame:
    """Parent periods of the input whose product x site has no child active in the horizon."""
    col = period_ordinal(pd.DatetimeIndex(pd.to_datetime(rows["period_start"])), period) - first_ord
    frame = rows[PARENT].assign(period_start=starts[col], value=rows["value"].to_numpy(float))
    agg = frame.groupby(PARENT + ["period_start"], sort=True)["value"].agg("mean" if m.rule == "replicate" else "sum")
    out = agg.rename("parent_value").reset_index()
    out.insert(0, "rule", m.rule)
    out.insert(0, "measure", name)
    out["pins_sum"] = 0.0
    out["pinned_children"] = 0
    out["active_children"] = 0
    out["split_total"] = out["parent_value"]
    out["status"] = STATUSES[NO_ACTIVE_CHILD]
    return out


def overflow_piece(name, split, value, has, pin, pinned, children, parents, parent_of_child, starts) -> pd.DataFrame:
    """One row per overflowing parent period: parent value, pins (customer=value) and the overflow."""
    par, col = np.nonzero(split.status == OVERFLOW)
    v = np.where(has[par, col], value[par, col], 0.0)
    out = parents[PARENT].iloc[par].reset_index(drop=True)
    out.insert(0, "measure", name)
    out["period_start"] = starts[col]
    out["parent_value"] = np.where(has[par, col], value[par, col], np.nan)
    out["pins_sum"] = split.pins_sum[par, col]
    out["overflow"] = np.abs(split.pins_sum[par, col] - v)  # what the pins take beyond the parent
    child, pcol = np.nonzero(pinned & (split.status == OVERFLOW)[parent_of_child])
    text = pd.DataFrame(
        {
            "p": parent_of_child[child],
            "c": pcol,
            "t": children["customer"].to_numpy(object)[child]
            + "="
            + pd.Series(pin[child, pcol]).map("{:g}".format).to_numpy(object),
        }
    )
    joined = text.groupby(["p", "c"])["t"].agg(", ".join)
    out["pins"] = joined.reindex(pd.MultiIndex.from_arrays([par, col])).to_numpy(object)
    return out


def overflow_message(overflow: pd.DataFrame, source) -> str:
    shown = overflow.head(20)
    lines = [
        f"{m} {p} / {s} {d:%Y-%m-%d}: parent {v:g}, pins {ps:g} ({pins}), {o:g} over"
        for m, p, s, d, v, ps, o, pins in shown[OVERFLOW_COLUMNS].itertuples(index=False)
    ]
    more = f"\n  ... and {len(overflow) - len(shown)} more" if len(overflow) > len(shown) else ""
    return (
        f"pins exceed their parent in {len(overflow)} parent period(s) (config {source}: pins.on_overflow "
        f"is error):\n  " + "\n  ".join(lines) + more + "\nLower the pins, raise the parent value, or set "
        "pins.on_overflow: warn to keep the pins and give the other customers 0."
    )
