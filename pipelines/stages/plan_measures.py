"""Stage 8, `plan_measures`: every measure of the plan split from product x site to the leaf.

A plan holds several measures (config `measures`). Each has parent values per
product x site and period: the statistical forecast's parent
(`parent_values: parent_forecast`) or the rows of the adjustments input whose
`measure` is its name (`parent_values: adjustments`). Each reaches the leaf
(product x site x customer) by its own split rule and proportions. A child
takes part in a period when it is active in it (`first_active_period` to
`last_active_period` of the share table: its customer span, its product's span
and the horizon intersected).

**Split rules** (top-down disaggregation, Gross & Sohl 1990, "Disaggregation
methods to expedite product line forecasting", J. of Forecasting 9(3)):

- `replicate`: x_j = V on every active child. For values per unit (prices,
  unit costs), which are copied, not divided.
- `even`: x_j = V / n over the n active children.
- `pro_rata`: x_j = V x b_j / sum_k b_k over the active children, b a basis:

  - `reinitialized_target`: the target of `reinitialized_target`; where the
    targets of a parent period are all 0, the period's shares (`fallback =
    period_share`), as the forecast stage splits. For a measure whose parent
    values are the parent forecast, parents whose class follows another
    strategy than `top_down` (bottom-up, forecast proportions, MinT, WLS) were
    not split by the target; their basis is the forecast's own leaf values
    (`basis = forecast_leaf`), so that measure equals `statistical_forecast`
    everywhere, to floating point.
  - `share_table:<name>`: the period shares of the share basis <name> (config
    `share_bases`: its own window, method and fallback windows), computed by
    the share engine of `pipelines.stages.share_tables` with the same
    lifecycle rules (`share_basis_tables`).
  - `measure:<name>`: the children's current values of another measure of the
    plan, after its own split and pins (e.g. a planner adjustment in
    proportion to the statistical forecast). Negative basis values count as
    0. Measures are split in an order where a basis comes before the measures
    that read it (`PlanningConfig.measure_order`; a cycle is a config error).

  Where the basis is 0 for every (unpinned) active child of a parent period,
  the split falls back to even over them (`fallback = even`). A fallback is
  recorded only where there is something to split (|R| > 0, R below).

**Parent values from the adjustments input.** A row belongs to the period
holding its `period_start`. Rows of one measure, parent and period are added up
for even / pro_rata (e.g. weekly values in a monthly plan) and averaged for
replicate (a price). Rows outside the horizon are not used; they are listed in
`unused_rows`. A measure the config does not know, or rows of a measure whose
parent values are the parent forecast, are an error naming the measures.

**Pins** (optional pins input). A pinned child keeps its value. The rest of the
parent, R = V - sum of pins (V = 0 where the parent has no value), is split
over the unpinned active children by the measure's rule. The pins exceed the
parent when R has the other sign than V (R < 0 for V >= 0, R > 0 for V < 0), or
when every active child is pinned and R != 0 (tolerance 1e-9 x max(|V|, 1)).
Then, per config `pins.on_overflow`: `error` stops with a `PinError` naming
the parent, period, pins and overflow; `warn` keeps the pins, gives the
unpinned children 0 (`fallback = pins_overflow`) and lists the parent period
in `overflow` (never a silent negative). For `replicate` a pin overrides that
child's value and nothing else. Pins of one leaf, measure and period are
combined like parent values (added up, or averaged for replicate). A pin on a
leaf that is not active in its period is not applied; it is listed in
`pins_not_applied` and fails the blocking check `pins_kept`.

**Integer split** (optional `integer: {pack_size: p}`, even and pro_rata only):
R is rounded to the nearest multiple of p (a half pack up) and split in whole
packs by the largest remainder method (`pipelines.engines.integer_split`).
Pins are kept as given, so the children sum to sum of pins + p x floor(R / p +
1/2): the parent rounded to the pack whenever the pins are whole packs.

A parent period with a non-zero value of an even / pro_rata measure and no
active child has no one to carry it: status `no_active_child`, a failing row of
the blocking check `measures_sum_to_parent`. For replicate that status only
says that no child has the value.

Vectorised: every measure is a few (children x horizon) matrices; group sums
are `np.add.at` over integer parent codes; no loop over parents or series (the
loop is over the handful of measures).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from pipelines.calendar import horizon_starts, period_ordinal
from pipelines.config import PlanningConfig
from pipelines.config_sections import MeasureConfig
from pipelines.engines.measure_split import (
    EVEN,
    FALLBACKS,
    NO_ACTIVE_CHILD,
    OVERFLOW,
    PIN_KEY,
    STATUSES,
    _parent_sum,
    _stack,
    split_cells,
)
from pipelines.engines.period_shares import period_shares
from pipelines.engines.shares import ShareRule, ShareSettings, compute_shares
from pipelines.errors import ConfigError, PinError
from pipelines.keys import LEAF, PARENT, factorize, lookup

PLAN_COLUMNS = LEAF + ["period_start", "cycle_date", "measure", "value", "parent_value", "rule", "basis", "fallback", "pinned"]
PARENT_COLUMNS = [
    "measure", "rule", "product", "site", "period_start", "parent_value", "pins_sum", "pinned_children",
    "active_children", "split_total", "status",
]
OVERFLOW_COLUMNS = ["measure", "product", "site", "period_start", "parent_value", "pins_sum", "overflow", "pins"]
UNUSED_COLUMNS = ["input", "measure", "product", "site", "customer", "period_start", "value", "reason"]
FORECAST_LEAF = "forecast_leaf"


@dataclass(frozen=True)
class PlanResult:
    """plan: PLAN_COLUMNS, one row per leaf, period and measure. parents: PARENT_COLUMNS, one row
    per measure, parent and period with a value or pins. overflow: the parent periods whose pins
    exceed the parent (warn mode), with the pins. pins_applied: the pins as combined per leaf,
    measure and period (PIN_KEY + value). pins_not_applied: pins that could not be applied, with a
    reason. unused_rows: input rows outside the horizon."""

    plan: pd.DataFrame
    parents: pd.DataFrame
    overflow: pd.DataFrame
    pins_applied: pd.DataFrame
    pins_not_applied: pd.DataFrame
    unused_rows: pd.DataFrame


def share_basis_tables(
    history: pd.DataFrame,
    children: pd.DataFrame,
    products: pd.DataFrame,
    config: PlanningConfig,
    cycle_date: pd.Timestamp,
) -> dict[str, pd.DataFrame]:
    """Period shares of every named share basis (config `share_bases`): leaf keys, period_start, share, fallback.

    Each basis runs the share engine (`engines.shares.compute_shares`, then
    `engines.period_shares.period_shares`) with its window, method and fallback
    windows in place of every product class's own. history: lifecycle history;
    children: `engines.children.active_children`.
    """
    out = {}
    starts = horizon_starts(cycle_date, config.calendar.horizon, config.calendar.period)
    settings = ShareSettings.of(config)
    for name, basis in config.share_bases.items():  # a few named bases, not a loop over series
        own = settings.with_rule(ShareRule.of(basis))  # its window, method and fallbacks in every class
        table = compute_shares(history, children, own, cycle_date)
        share = period_shares(table, own, cycle_date, products, history)[0]
        frame = table[LEAF].loc[table.index.repeat(len(starts))].reset_index(drop=True)
        frame["period_start"] = np.tile(starts.values, len(table))
        frame["share"] = share.ravel()
        frame["fallback"] = np.repeat(table["fallback"].to_numpy(), len(starts))
        out[name] = frame
    return out


def _cells(frame: pd.DataFrame, cols: list[str], table: pd.DataFrame, first_ord: int, h: int, period: str):
    """(row in table, horizon column, inside) of each row of `frame` keyed by `cols` and `period_start`."""
    row = lookup(frame, cols, table) if len(frame) else np.zeros(0, dtype=np.int64)
    col = period_ordinal(pd.DatetimeIndex(pd.to_datetime(frame["period_start"])), period) - first_ord
    return row, col, (col >= 0) & (col < h)


def _matrix(frame: pd.DataFrame, cols: list[str], table: pd.DataFrame, column: str | list[str], first_ord: int, h: int, period: str):
    """(len(table), h) matrix of `column` (one per name of a list) from a long frame keyed by `cols` and
    period_start, 0 where absent; the keys are looked up once for all columns."""
    names = [column] if isinstance(column, str) else column
    out = [np.zeros((len(table), h)) for _ in names]
    if len(frame):
        row, col, inside = _cells(frame, cols, table, first_ord, h, period)
        ok = inside & (row >= 0)
        for m, name in zip(out, names):
            m[row[ok], col[ok]] = frame[name].to_numpy(float)[ok]
    return out[0] if isinstance(column, str) else out


def _combine(row: np.ndarray, col: np.ndarray, value: np.ndarray, shape: tuple[int, int], mean: bool):
    """Sum (or mean) of `value` per (row, col) cell, and which cells have any."""
    total = np.zeros(shape)
    count = np.zeros(shape)
    np.add.at(total, (row, col), value)
    np.add.at(count, (row, col), 1.0)
    if mean:
        total = np.divide(total, count, out=np.zeros(shape), where=count > 0)
    return total, count > 0


def _check_measures_known(frame: pd.DataFrame, config: PlanningConfig, what: str) -> None:
    names = set(frame["measure"].dropna().unique())
    unknown = sorted(names - set(config.measures))
    if unknown:
        raise ConfigError(
            f"{config.source}: the {what} input names measure(s) {unknown} that config measures does not define "
            f"(defined: {sorted(config.measures)}); add them under measures: or correct the measure column."
        )
    from_forecast = sorted(n for n in names if config.measures[n].parent_values == "parent_forecast")
    if from_forecast and what == "adjustments":
        raise ConfigError(
            f"{config.source}: the adjustments input has rows of {from_forecast}, whose parent values come from "
            f"the statistical forecast (parent_values: parent_forecast); enter changes as another measure "
            f"(e.g. planner_adjustment) or pin leaves in the pins input."
        )


def plan_measures(
    children: pd.DataFrame,
    parent_forecast: pd.DataFrame,
    leaf_forecast: pd.DataFrame,
    target: pd.DataFrame,
    adjustments: pd.DataFrame,
    pins: pd.DataFrame,
    config: PlanningConfig,
    cycle_date: pd.Timestamp,
    share_bases: dict[str, pd.DataFrame] | None = None,
) -> PlanResult:
    """Every configured measure at leaf grain, long format; see the module docstring.

    children: leaf keys, first_active_period, last_active_period (the share
    table). parent_forecast: product, site, period_start, forecast, optional
    strategy. leaf_forecast: leaf keys, period_start, forecast
    (`statistical_forecast`). target: `reinitialized_target` (leaf keys,
    period_start, target, share). adjustments: measure, product, site,
    period_start, value. pins: product, site, customer, period_start, measure,
    value. share_bases: `share_basis_tables` (needed by share_table bases).
    """
    period = config.calendar.period
    h = config.calendar.horizon
    starts = horizon_starts(cycle_date, h, period)
    first_ord = int(period_ordinal(starts[:1], period)[0])
    children = children.sort_values(LEAF, kind="stable").reset_index(drop=True)
    n = len(children)
    parent_of_child, parents = factorize(children, PARENT)
    n_parents = len(parents)
    h_ord = period_ordinal(starts, period)
    first = period_ordinal(pd.DatetimeIndex(children["first_active_period"]), period)[:, None]
    last = period_ordinal(pd.DatetimeIndex(children["last_active_period"]), period)[:, None]
    active = (h_ord[None, :] >= first) & (h_ord[None, :] <= last)
    order = np.arange(n)  # children are in key order
    _check_measures_known(adjustments, config, "adjustments")
    _check_measures_known(pins, config, "pins")

    unused = []
    adj_row, adj_col, adj_inside = _cells(adjustments, PARENT, parents, first_ord, h, period)
    if (~adj_inside).any():
        unused.append(adjustments.loc[~adj_inside].assign(input="adjustments", customer=None, reason="outside_horizon"))
    pin_row, pin_col, pin_inside = _cells(pins, LEAF, children, first_ord, h, period)
    if (~pin_inside).any():
        unused.append(pins.loc[~pin_inside].assign(input="pins", reason="outside_horizon"))
    not_child = pin_inside & (pin_row < 0)
    inactive = pin_inside & (pin_row >= 0) & ~active[np.clip(pin_row, 0, None), np.clip(pin_col, 0, h - 1)]
    pins_not_applied = pd.concat(
        [
            pins.loc[not_child].assign(reason="not a customer of this product x site active in the horizon"),
            pins.loc[inactive].assign(reason="customer not active in this period (outside its span or its product's)"),
        ],
        ignore_index=True,
    )
    pin_ok = pin_inside & ~not_child & ~inactive
    pin_starts = starts[np.clip(pin_col, 0, h - 1)]

    target_m, share_m = _matrix(target, LEAF, children, ["target", "share"], first_ord, h, period)
    mats = {"target": target_m, "share": share_m, "forecast": _matrix(leaf_forecast, LEAF, children, "forecast", first_ord, h, period)}
    for basis_name, frame in (share_bases or {}).items():
        mats[f"share_table:{basis_name}"] = _matrix(frame, LEAF, children, "share", first_ord, h, period)
    # the strategy of each parent's class (absent = top-down, the forecast stage's default grain)
    top_down = np.ones(n_parents, dtype=bool)
    if "strategy" in parent_forecast.columns and len(parent_forecast):
        first_rows = parent_forecast.drop_duplicates(PARENT)
        pos = lookup(parents, PARENT, first_rows)
        found = first_rows["strategy"].to_numpy(object)
        top_down = np.where(pos >= 0, found[np.clip(pos, 0, None)] == "top_down", True)

    pieces, parent_pieces, overflow_pieces, applied_pieces = {}, [], [], []
    for name in config.measure_order():  # a handful of measures
        m = config.measures[name]
        mean = m.rule == "replicate"
        if m.parent_values == "parent_forecast":
            value, has = _matrix(parent_forecast.assign(_has=1.0), PARENT, parents, ["forecast", "_has"], first_ord, h, period)
            has = has > 0
        else:
            mine = (adjustments["measure"] == name).to_numpy() & adj_inside
            ok = mine & (adj_row >= 0)
            value, has = _combine(adj_row[ok], adj_col[ok], adjustments["value"].to_numpy(float)[ok], (n_parents, h), mean)
            orphans = adjustments.loc[mine & (adj_row < 0)]
            if len(orphans):
                parent_pieces.append(_orphan_parents(orphans, name, m, period, first_ord, starts))
        mine_pin = (pins["measure"] == name).to_numpy() & pin_ok
        pin, pinned = _combine(pin_row[mine_pin], pin_col[mine_pin], pins["value"].to_numpy(float)[mine_pin], (n, h), mean)
        if mine_pin.any():
            combined = pins.loc[mine_pin, PIN_KEY].assign(period_start=pin_starts[mine_pin]).drop_duplicates()
            cell = lookup(combined, LEAF, children), period_ordinal(pd.DatetimeIndex(combined["period_start"]), period) - first_ord
            applied_pieces.append(combined.assign(value=pin[cell]))

        basis, fallback_basis, label = _basis(m, name, mats, top_down, parent_of_child)
        split = split_cells(
            m.rule, value, has, parent_of_child, active, pin, pinned, basis, fallback_basis,
            None if m.integer is None else m.integer.pack_size, order,
        )
        mats[f"measure:{name}"] = np.where(split.rows, split.value, 0.0)
        pieces[name] = _plan_piece(name, m, split, value, has, pinned, label, children, parent_of_child, starts, cycle_date)
        parent_pieces.append(_parent_piece(name, m, split, value, has, pinned, active, parents, parent_of_child, starts))
        if (split.status == OVERFLOW).any():
            overflow_pieces.append(_overflow_piece(name, split, value, has, pin, pinned, children, parents, parent_of_child, starts))

    # in config order; inside a measure the rows already follow the sorted children, then the period
    plan = _stack([pieces[name] for name in config.measures], PLAN_COLUMNS).astype(
        {"period_start": "datetime64[ns]", "cycle_date": "datetime64[ns]", "value": float, "parent_value": float, "pinned": bool}
    )
    parents_out = _stack(parent_pieces, PARENT_COLUMNS)
    overflow = _stack(overflow_pieces, OVERFLOW_COLUMNS)
    if len(overflow) and config.pins.on_overflow == "error":
        raise PinError(_overflow_message(overflow, config))
    unused_rows = _stack(unused, UNUSED_COLUMNS)
    return PlanResult(
        plan=plan,
        parents=parents_out,
        overflow=overflow,
        pins_applied=_stack(applied_pieces, PIN_KEY + ["value"]),
        pins_not_applied=pins_not_applied[PIN_KEY + ["value", "reason"]].reset_index(drop=True),
        unused_rows=unused_rows,
    )


def _basis(m: MeasureConfig, name: str, mats: dict[str, np.ndarray], top_down: np.ndarray, parent_of_child: np.ndarray):
    """(basis, fallback basis, label per parent) of a measure; `mats` holds the leaf matrices by name."""
    n_parents = len(top_down)
    if m.rule != "pro_rata":
        return None, None, np.full(n_parents, "parent" if m.rule == "replicate" else "even", dtype=object)
    b = m.basis
    label = np.full(n_parents, b.label, dtype=object)
    if b.kind == "reinitialized_target":
        if m.parent_values != "parent_forecast":
            return mats["target"], mats["share"], label
        # the forecast's own split: the target where the class is split top-down, else its leaf values
        td = top_down[parent_of_child][:, None]
        label[~top_down] = FORECAST_LEAF
        return np.where(td, mats["target"], mats["forecast"]), np.where(td, mats["share"], 0.0), label
    key = f"{b.kind}:{b.name}"
    if key not in mats:
        raise ConfigError(f"measures.{name}: basis {key} is not available; pass its share_basis_tables(...) frame")
    return mats[key], None, label


def _plan_piece(name, m, split, value, has, pinned, label, children, parent_of_child, starts, cycle_date) -> pd.DataFrame:
    child, col = np.nonzero(split.rows)
    par = parent_of_child[child]
    code = split.fallback[child, col]
    is_pin = pinned[child, col]
    basis = np.where(is_pin, "pin", np.where(code == EVEN, "even", label[par]))
    out = children[LEAF].iloc[child].reset_index(drop=True)
    out["period_start"] = starts[col]
    out["cycle_date"] = cycle_date
    out["measure"] = name
    out["value"] = split.value[child, col]
    out["parent_value"] = np.where(has[par, col], value[par, col], np.nan)
    out["rule"] = m.rule
    out["basis"] = basis
    out["fallback"] = np.asarray(FALLBACKS, dtype=object)[code]
    out["pinned"] = is_pin
    return out


def _parent_piece(name, m, split, value, has, pinned, active, parents, parent_of_child, starts) -> pd.DataFrame:
    n_parents = len(parents)
    par, col = np.nonzero(split.live)
    n_active = _parent_sum(active.astype(float), parent_of_child, n_parents)
    n_pinned = _parent_sum(pinned.astype(float), parent_of_child, n_parents)
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


def _orphan_parents(rows: pd.DataFrame, name: str, m: MeasureConfig, period: str, first_ord: int, starts) -> pd.DataFrame:
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


def _overflow_piece(name, split, value, has, pin, pinned, children, parents, parent_of_child, starts) -> pd.DataFrame:
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
        {"p": parent_of_child[child], "c": pcol, "t": children["customer"].to_numpy(object)[child] + "=" + pd.Series(pin[child, pcol]).map("{:g}".format).to_numpy(object)}
    )
    joined = text.groupby(["p", "c"])["t"].agg(", ".join)
    out["pins"] = joined.reindex(pd.MultiIndex.from_arrays([par, col])).to_numpy(object)
    return out


def _overflow_message(overflow: pd.DataFrame, config: PlanningConfig) -> str:
    shown = overflow.head(20)
    lines = [
        f"{m} {p} / {s} {d:%Y-%m-%d}: parent {v:g}, pins {ps:g} ({pins}), {o:g} over"
        for m, p, s, d, v, ps, o, pins in shown[OVERFLOW_COLUMNS].itertuples(index=False)
    ]
    more = f"\n  ... and {len(overflow) - len(shown)} more" if len(overflow) > len(shown) else ""
    return (
        f"pins exceed their parent in {len(overflow)} parent period(s) (config {config.source}: pins.on_overflow "
        f"is error):\n  " + "\n  ".join(lines) + more + "\nLower the pins, raise the parent value, or set "
        "pins.on_overflow: warn to keep the pins and give the other customers 0."
    )

