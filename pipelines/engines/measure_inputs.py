"""The inputs of a measure's split as (children x horizon) matrices, what each measure is split by, the share bases."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from pipelines.calendar import horizon_starts, ordinal_to_start, period_ordinal
from pipelines.config_sections import MeasureConfig
from pipelines.engines.period_shares import period_shares
from pipelines.engines.share_rows import ShareRows
from pipelines.engines.share_settings import ShareRule, ShareSettings
from pipelines.engines.shares import child_frame, horizon_basis
from pipelines.errors import ConfigError
from pipelines.keys import LEAF, LEAF_ID, PARENT, Coded, ids_in, lookup, rows_in
from pipelines.vocabulary import Basis


def cells_of(frame: pd.DataFrame, cols: list[str], table: pd.DataFrame, first_ord: int, h: int, period: str):
    """(row in table, horizon column, inside) of each row of `frame` keyed by `cols` and `period_start`.

    A frame carrying the id of its key (`leaf_id` for the leaf key, `parent_id` for the parent key) is looked
    up through its own ids: its distinct keys once, not a text key per row (`pipelines.keys.rows_in`; `table`'s
    keys only, so no id of another table is trusted)."""
    row = rows_in(frame, table[cols], cols) if len(frame) else np.zeros(0, dtype=np.int64)
    starts = frame["period_start"]
    if not pd.api.types.is_datetime64_dtype(starts.dtype):  # text or dates as given; datetime64 is used as it is
        starts = pd.to_datetime(starts)
    col = period_ordinal(pd.DatetimeIndex(starts), period) - first_ord
    return row, col, (col >= 0) & (col < h)


def leaf_matrix(
    frame: pd.DataFrame,
    cols: list[str],
    table: pd.DataFrame,
    column: str | list[str],
    first_ord: int,
    h: int,
    period: str,
):
    """(len(table), h) matrix of `column` (one per name of a list) from a long frame keyed by `cols` and
    period_start, 0 where absent; the keys are looked up once for all columns. A frame aligned with the table
    gives its columns' own arrays reshaped (no copy): the matrices are read, never written."""
    names = [column] if isinstance(column, str) else column
    if _aligned(frame, cols, table, first_ord, h, period):  # a row per table row and period, in their order
        out = [frame[name].to_numpy(float).reshape(len(table), h) for name in names]
        return out[0] if isinstance(column, str) else out
    out = [np.zeros((len(table), h)) for _ in names]
    if len(frame):
        row, col, inside = cells_of(frame, cols, table, first_ord, h, period)
        ok = inside & (row >= 0)
        for m, name in zip(out, names, strict=False):
            m[row[ok], col[ok]] = frame[name].to_numpy(float)[ok]
    return out[0] if isinstance(column, str) else out


def _aligned(frame: pd.DataFrame, cols: list[str], table: pd.DataFrame, first_ord: int, h: int, period: str) -> bool:
    """Whether `frame` holds exactly the table's rows x the horizon's periods, table row by table row, each
    table row's h periods in order (as the stages write their leaf tables): then its columns are the matrices.

    Proven on the frame's own ids (a leaf table carries `leaf_id`, one per key): each block of h rows has one
    id, the blocks' keys are the table's keys in order, and every period is the horizon's. Else False."""
    n = len(table)
    ids = ids_in(frame, (LEAF_ID,)) if cols == LEAF else []
    starts = frame["period_start"].to_numpy() if "period_start" in frame.columns else None
    if not ids or not n or len(frame) != n * h or starts is None or starts.dtype != "datetime64[ns]":
        return False
    own = frame[LEAF_ID].to_numpy().reshape(n, h)
    if not (own == own[:, :1]).all():
        return False
    if not all(np.array_equal(frame[c].to_numpy()[::h], table[c].to_numpy()) for c in cols):
        return False
    horizon = ordinal_to_start(first_ord + np.arange(h), period).to_numpy()
    return bool((starts.reshape(n, h) == horizon[None]).all())


def combine_cells(row: np.ndarray, col: np.ndarray, value: np.ndarray, shape: tuple[int, int], mean: bool):
    """Sum (or mean) of `value` per (row, col) cell, and which cells have any."""
    total = np.zeros(shape)
    count = np.zeros(shape)
    np.add.at(total, (row, col), value)
    np.add.at(count, (row, col), 1.0)
    if mean:
        total = np.divide(total, count, out=np.zeros(shape), where=count > 0)
    return total, count > 0


def pins_to_apply(
    pins: pd.DataFrame, pin_row: np.ndarray, pin_col: np.ndarray, inside: np.ndarray, active: np.ndarray
) -> tuple[np.ndarray, pd.DataFrame]:
    """Which pins inside the horizon can be applied (their leaf is a child active in the period), and the
    pins that cannot, each with its reason. pin_row, pin_col, inside: `cells_of` the pins over the children;
    active: (n_children, horizon) bool."""
    h = active.shape[1]
    not_child = inside & (pin_row < 0)
    inactive = inside & (pin_row >= 0) & ~active[np.clip(pin_row, 0, None), np.clip(pin_col, 0, h - 1)]
    not_applied = pd.concat(
        [
            pins.loc[not_child].assign(reason="not a customer of this product x site active in the horizon"),
            pins.loc[inactive].assign(reason="customer not active in this period (outside its span or its product's)"),
        ],
        ignore_index=True,
    )
    return inside & ~not_child & ~inactive, not_applied


def top_down_parents(parent_forecast: pd.DataFrame, parents: pd.DataFrame) -> np.ndarray:
    """(n_parents,) bool: the parent's class follows `top_down` (absent strategy = top-down, the forecast's default)."""
    top_down = np.ones(len(parents), dtype=bool)
    if "strategy" in parent_forecast.columns and len(parent_forecast):
        first_rows = parent_forecast.drop_duplicates(PARENT)
        pos = lookup(parents, PARENT, first_rows)
        found = first_rows["strategy"].to_numpy(object)
        top_down = np.where(pos >= 0, found[np.clip(pos, 0, None)] == "top_down", True)
    return top_down


def check_measures_known(frame: pd.DataFrame, config, what: str) -> None:
    """Refuse input rows of measures the config does not define (config: a PlanSettings or PlanningConfig)."""
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


def basis_of(
    m: MeasureConfig, name: str, mats: dict[str, np.ndarray], top_down: np.ndarray, parent_of_child: np.ndarray
):
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
        label[~top_down] = Basis.LEAF_FORECAST
        return np.where(td, mats["target"], mats["forecast"]), np.where(td, mats["share"], 0.0), label
    key = f"{b.kind}:{b.name}"
    if key not in mats:
        raise ConfigError(f"measures.{name}: basis {key} is not available; pass its share_bases_of(...) basis")
    return mats[key], None, label


@dataclass(frozen=True)
class BasisShares:
    """One share basis's period shares: `table`, the share engine's rows (`shares.horizon_basis`: one row per
    child, leaf keys and ids, history share, fallback, lifecycle rule), and `share`, (len(table), H) over
    the horizon periods `starts`."""

    table: pd.DataFrame
    share: np.ndarray
    starts: pd.DatetimeIndex

    def frame(self) -> pd.DataFrame:
        """The long frame: leaf keys (and leaf_id), period_start, share, fallback; a row per child and period."""
        h = len(self.starts)
        table = self.table
        frame = table[LEAF + ids_in(table, (LEAF_ID,))].loc[table.index.repeat(h)].reset_index(drop=True)
        frame["period_start"] = np.tile(self.starts.values, len(table))
        frame["share"] = self.share.ravel()
        frame["fallback"] = np.repeat(table["fallback"].to_numpy(), h)
        return frame

    def matrix(self, children: pd.DataFrame) -> np.ndarray:
        """(len(children), H) shares of `children` (leaf keys), 0 for a child the basis does not hold; the
        basis's own matrix, uncopied, when its rows are the children in their order (as the plan sorts both)."""
        table = self.table
        if len(table) == len(children) and all(
            np.array_equal(table[c].to_numpy(object), children[c].to_numpy(object)) for c in LEAF
        ):
            return np.asarray(self.share, dtype=float)
        out = np.zeros((len(children), self.share.shape[1]))
        row = lookup(children, LEAF, table)
        out[row >= 0] = self.share[row[row >= 0]]
        return out


def share_bases_of(
    history: pd.DataFrame,
    children: pd.DataFrame,
    products: pd.DataFrame,
    config,
    cycle_date: pd.Timestamp,
    keys: Coded | None = None,
    rows: ShareRows | None = None,
) -> dict[str, BasisShares]:
    """Period shares of every named share basis (config `share_bases`), per child and horizon period.

    Each basis runs the share engine (`engines.shares.compute_shares`' history shares and rows, as
    `horizon_basis` keeps them, then `engines.period_shares.period_shares`, its shares only) with its window,
    method and fallback windows in place of every product class's own. history: lifecycle history;
    children: `engines.children.active_children`; keys: `coded(history)`, rows: its `history_rows`, when the
    caller has them. The window- and method-free part of the share engine (`child_frame`: the children
    completed, their lifecycle rules, each child's leaf id) reads the lifecycle settings only, which no basis
    changes: made once, without the lifecycle rules in words, which only the share table shows.
    """
    out = {}
    starts = horizon_starts(cycle_date, config.calendar.horizon, config.calendar.period)
    # a PlanSettings carries the share engine's settings; a PlanningConfig makes them
    settings = getattr(config, "share", None) or ShareSettings.of(config)
    made = None
    for name, basis in config.share_bases.items():  # a few named bases, not a loop over series
        own = settings.with_rule(ShareRule.of(basis))  # its window, method and fallbacks in every class
        made = made or child_frame(history, children, own, cycle_date, keys, rows, detail=False)
        table = horizon_basis(history, children, own, cycle_date, made)
        share = period_shares(table, own, cycle_date, products, history, reasons=False)[0]
        out[name] = BasisShares(table, share, starts)
    return out


def share_basis_tables(bases: dict[str, BasisShares]) -> dict[str, pd.DataFrame]:
    """The long frames of `share_bases_of`'s bases: leaf keys, period_start, share, fallback (`BasisShares.frame`)."""
    return {name: basis.frame() for name, basis in bases.items()}
