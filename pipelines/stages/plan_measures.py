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
    (`basis = leaf_forecast`), so that measure equals `statistical_forecast`
    everywhere, to floating point.
  - `share_table:<name>`: the period shares of the share basis <name> (config
    `share_bases`: its own window, method and fallback windows), computed by
    the share engine of `pipelines.stages.share_tables` with the same
    lifecycle rules (`share_bases_of`).
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

from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from pipelines.calendar import horizon_starts, period_ordinal
from pipelines.checks import MEASURES_SUM_TO_PARENT, PINS_KEPT, PINS_WITHIN_PARENT
from pipelines.config import CalendarConfig, PlanningConfig, check_windows_fit
from pipelines.config_sections import MeasureConfig, PinsConfig, ShareBasisConfig
from pipelines.engines.children import active_children
from pipelines.engines.forecast_frames import active_matrix
from pipelines.engines.measure_inputs import (
    BasisShares,
    basis_of,
    cells_of,
    check_measures_known,
    combine_cells,
    leaf_matrix,
    pins_to_apply,
    share_bases_of,
    top_down_parents,
)
from pipelines.engines.measure_parents import parent_sum
from pipelines.engines.measure_rows import plan_piece, plan_table
from pipelines.engines.measure_split import (
    OVERFLOW,
    OVERFLOW_COLUMNS,
    PARENT_COLUMNS,
    PIN_KEY,
    _stack,
    find_pins_not_kept,
    find_sum_violations,
    orphan_parents,
    overflow_message,
    overflow_piece,
    parent_piece,
    plan_totals,
    split_cells,
)
from pipelines.engines.plan_codes import group_sizes
from pipelines.engines.share_rows import history_rows
from pipelines.engines.share_settings import ShareSettings
from pipelines.errors import PinError
from pipelines.keys import LEAF, PARENT, coded, factorize, lookup
from pipelines.results import CheckRows, Log, StageResult, quiet

UNUSED_COLUMNS = ["input", "measure", "product", "site", "customer", "period_start", "value", "reason"]


@dataclass(frozen=True)
class PlanSettings:
    """What the plan reads: the calendar, the measures in split order, the share bases, the pins rule."""

    calendar: CalendarConfig
    measures: Mapping[str, MeasureConfig]
    share_bases: Mapping[str, ShareBasisConfig]
    pins: PinsConfig
    share: ShareSettings
    order: tuple[str, ...]
    source: Path = Path("<memory>")

    @classmethod
    def of(cls, config: PlanningConfig) -> PlanSettings:
        order = tuple(config.measure_order())
        share = ShareSettings.of(config)
        return cls(config.calendar, config.measures, config.share_bases, config.pins, share, order, config.source)

    def measure_order(self) -> list[str]:
        return list(self.order)

    def basis_windows(self) -> dict[str, int]:
        return {f"share_bases.{name}.window": basis.window for name, basis in self.share_bases.items()}


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


def plan_measures(
    children: pd.DataFrame,
    parent_forecast: pd.DataFrame,
    leaf_forecast: pd.DataFrame,
    target: pd.DataFrame,
    adjustments: pd.DataFrame,
    pins: pd.DataFrame,
    config: PlanningConfig,
    cycle_date: pd.Timestamp,
    share_bases: Mapping[str, BasisShares | pd.DataFrame] | None = None,
) -> PlanResult:
    """Every configured measure at leaf grain, long format; see the module docstring.

    children: leaf keys, first_active_period, last_active_period (the share
    table). parent_forecast: product, site, period_start, forecast, optional
    strategy. leaf_forecast: leaf keys, period_start, forecast
    (`statistical_forecast`). target: `reinitialized_target` (leaf keys,
    period_start, target, share). adjustments: measure, product, site,
    period_start, value. pins: product, site, customer, period_start, measure,
    value. share_bases: `share_bases_of` (or its long frames, `share_basis_tables(share_bases_of(...))`;
    needed by share_table bases).
    """
    period = config.calendar.period
    h = config.calendar.horizon
    starts = horizon_starts(cycle_date, h, period)
    first_ord = int(period_ordinal(starts[:1], period)[0])
    children = children.sort_values(LEAF, kind="stable").reset_index(drop=True)
    n = len(children)
    parent_of_child, parents = factorize(children, PARENT)
    n_parents = len(parents)
    active = active_matrix(children, starts, period)
    n_active = parent_sum(active, parent_of_child, n_parents)  # the same for every measure
    order = np.arange(n)  # children are in key order
    check_measures_known(adjustments, config, "adjustments")
    check_measures_known(pins, config, "pins")

    unused = []
    adj_row, adj_col, adj_inside = cells_of(adjustments, PARENT, parents, first_ord, h, period)
    if (~adj_inside).any():
        unused.append(adjustments.loc[~adj_inside].assign(input="adjustments", customer=None, reason="outside_horizon"))
    pin_row, pin_col, pin_inside = cells_of(pins, LEAF, children, first_ord, h, period)
    if (~pin_inside).any():
        unused.append(pins.loc[~pin_inside].assign(input="pins", reason="outside_horizon"))
    pin_ok, pins_not_applied = pins_to_apply(pins, pin_row, pin_col, pin_inside, active)
    pin_starts = starts[np.clip(pin_col, 0, h - 1)]

    # the leaf matrices the measures' bases read, and only those
    bases = {(m.basis.kind, m.parent_values) for m in config.measures.values() if m.rule == "pro_rata"}
    read = {m.basis.label for m in config.measures.values() if m.rule == "pro_rata"}
    mats = {}
    if any(kind == "reinitialized_target" for kind, _ in bases):
        mats["target"], mats["share"] = leaf_matrix(target, LEAF, children, ["target", "share"], first_ord, h, period)
    if ("reinitialized_target", "parent_forecast") in bases:
        mats["forecast"] = leaf_matrix(leaf_forecast, LEAF, children, "forecast", first_ord, h, period)
    for basis_name, given in (share_bases or {}).items():
        mats[f"share_table:{basis_name}"] = (
            given.matrix(children)
            if isinstance(given, BasisShares)
            else leaf_matrix(given, LEAF, children, "share", first_ord, h, period)
        )
    top_down = top_down_parents(parent_forecast, parents)

    pieces, parent_pieces, overflow_pieces, applied_pieces = {}, [], [], []
    no_pins = np.zeros((n, h), dtype=bool)  # the pins of a measure without any: read, never written
    for name in config.measure_order():  # a handful of measures
        m = config.measures[name]
        mean = m.rule == "replicate"
        if m.parent_values == "parent_forecast":
            value, has = leaf_matrix(
                parent_forecast.assign(_has=1.0), PARENT, parents, ["forecast", "_has"], first_ord, h, period
            )
            has = has > 0
        else:
            mine = (adjustments["measure"] == name).to_numpy() & adj_inside
            ok = mine & (adj_row >= 0)
            value, has = combine_cells(
                adj_row[ok], adj_col[ok], adjustments["value"].to_numpy(float)[ok], (n_parents, h), mean
            )
            orphans = adjustments.loc[mine & (adj_row < 0)]
            if len(orphans):
                parent_pieces.append(orphan_parents(orphans, name, m, period, first_ord, starts))
        mine_pin = (pins["measure"] == name).to_numpy() & pin_ok
        pin, pinned = None, no_pins
        if mine_pin.any():
            pin, pinned = combine_cells(
                pin_row[mine_pin], pin_col[mine_pin], pins["value"].to_numpy(float)[mine_pin], (n, h), mean
            )
            combined = pins.loc[mine_pin, PIN_KEY].assign(period_start=pin_starts[mine_pin]).drop_duplicates()
            cell = (
                lookup(combined, LEAF, children),
                period_ordinal(pd.DatetimeIndex(combined["period_start"]), period) - first_ord,
            )
            applied_pieces.append(combined.assign(value=pin[cell]))

        basis, fallback_basis, label = basis_of(m, name, mats, top_down, parent_of_child)
        split = split_cells(
            m.rule, value, has, parent_of_child, active, pin, pinned, basis, fallback_basis,
            None if m.integer is None else m.integer.pack_size, order, n_active,
        )
        if f"measure:{name}" in read:  # a later measure's basis
            mats[f"measure:{name}"] = np.where(split.rows, split.value, 0.0)
        pieces[name] = plan_piece(name, m, split, value, has, pinned, label, parent_of_child)
        parent_pieces.append(parent_piece(name, m, split, value, has, pinned, active, parents, parent_of_child, starts))
        if (split.status == OVERFLOW).any():
            overflow_pieces.append(
                overflow_piece(name, split, value, has, pin, pinned, children, parents, parent_of_child, starts)
            )

    # in config order; inside a measure the rows already follow the sorted children, then the period
    plan = plan_table([pieces[name] for name in config.measures], children, starts, cycle_date)
    parents_out = _stack(parent_pieces, PARENT_COLUMNS)
    overflow = _stack(overflow_pieces, OVERFLOW_COLUMNS)
    if len(overflow) and config.pins.on_overflow == "error":
        raise PinError(overflow_message(overflow, config.source))
    unused_rows = _stack(unused, UNUSED_COLUMNS)
    return PlanResult(
        plan=plan,
        parents=parents_out,
        overflow=overflow,
        pins_applied=_stack(applied_pieces, PIN_KEY + ["value"]),
        pins_not_applied=pins_not_applied[PIN_KEY + ["value", "reason"]].reset_index(drop=True),
        unused_rows=unused_rows,
    )


def split(
    parent_forecast: pd.DataFrame,
    statistical_forecast: pd.DataFrame,
    reinitialized_target: pd.DataFrame,
    share_tables: pd.DataFrame,
    lifecycle_history: pd.DataFrame,
    products: pd.DataFrame,
    customer_spans: pd.DataFrame,
    adjustments: pd.DataFrame,
    pins: pd.DataFrame,
    cycle_calendar: pd.DataFrame,
    settings: PlanSettings,
) -> tuple[PlanResult, dict[str, BasisShares]]:
    """The plan's split from the stage's input tables: its result and the share bases it made."""
    cycle = cycle_calendar.iloc[0]
    check_windows_fit(settings.basis_windows(), int(cycle["history_periods"]), settings.source)
    cycle_date = pd.Timestamp(cycle["cycle_date"])
    bases = {}
    if settings.share_bases:
        # the history's ids and keys coded and its rows read once; the children's own periods as the share
        # table counted them
        keys = coded(lifecycle_history)
        rows = history_rows(lifecycle_history, keys, settings.share, cycle_date)
        children = active_children(
            customer_spans, products, lifecycle_history, settings.share, cycle_date, keys, rows, counted=share_tables
        )
        bases = share_bases_of(lifecycle_history, children, products, settings, cycle_date, keys, rows)
        # the history's per-row arrays (ids, ages, counted rows) freed before the split: its matrices and the
        # plan's columns reuse their memory instead of first touches of more
        del keys, rows, children
    result = plan_measures(
        share_tables,
        parent_forecast,
        statistical_forecast,
        reinitialized_target,
        adjustments,
        pins,
        settings,
        cycle_date,
        bases,
    )
    return result, bases


def plan_checks(plan: pd.DataFrame, result: PlanResult, settings: PlanSettings) -> dict[str, CheckRows]:
    """The plan's checks: `plan` judged against the parent values, pins and overflow of the split."""
    return {
        MEASURES_SUM_TO_PARENT: CheckRows(find_sum_violations(plan, result.parents, settings.measures)),
        PINS_KEPT: CheckRows(find_pins_not_kept(plan, result.pins_applied, result.pins_not_applied)),
        PINS_WITHIN_PARENT: CheckRows(result.overflow),
    }


def run(
    parent_forecast: pd.DataFrame,
    statistical_forecast: pd.DataFrame,
    reinitialized_target: pd.DataFrame,
    share_tables: pd.DataFrame,
    lifecycle_history: pd.DataFrame,
    products: pd.DataFrame,
    customer_spans: pd.DataFrame,
    adjustments: pd.DataFrame,
    pins: pd.DataFrame,
    cycle_calendar: pd.DataFrame,
    settings: PlanSettings,
    log: Log = quiet,
) -> StageResult:
    """The plan's measures at leaf grain, with the share bases' fallbacks and the plan's three checks."""
    result, bases = split(
        parent_forecast, statistical_forecast, reinitialized_target, share_tables, lifecycle_history, products,
        customer_spans, adjustments, pins, cycle_calendar, settings,
    )
    plan = result.plan
    basis_fallbacks = [
        b.table.drop_duplicates(PARENT)
        .groupby("fallback")
        .size()
        .rename("parents")
        .reset_index()
        .assign(share_basis=n)
        for n, b in bases.items()
    ]
    figures = {
        "measures": ", ".join(settings.measures),
        "rows_by_measure_and_rule": group_sizes(plan, ["measure", "rule", "basis", "fallback"], "rows"),
        "totals_parent_vs_leaf": plan_totals(plan, result.parents),
        "pins_applied": len(result.pins_applied),
        "pins_overflowing_parents": len(result.overflow),
        "inputs_outside_horizon": len(result.unused_rows),
        "share_basis_fallbacks": pd.concat(basis_fallbacks, ignore_index=True) if bases else pd.DataFrame(),
    }
    return StageResult(
        outputs={"plan_measures": plan},
        metadata={"plan_measures": figures},
        checks=plan_checks(plan, result, settings),
    )
