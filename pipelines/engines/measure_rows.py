"""The plan's rows: one per leaf, period and measure, made from the measures' splits in one go.

Each measure's split gives arrays over its cells (`plan_piece`); `plan_table`
joins them and takes the leaf keys of every row with one gather over the
children, rather than a frame per measure stacked and copied again.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from pipelines.engines.measure_split import EVEN, FALLBACKS, Split
from pipelines.keys import LEAF

PLAN_COLUMNS = LEAF + [
    "period_start",
    "cycle_date",
    "measure",
    "value",
    "parent_value",
    "rule",
    "basis",
    "fallback",
    "pinned",
]
PLAN_TYPES = {
    "period_start": "datetime64[ns]",
    "cycle_date": "datetime64[ns]",
    "value": float,
    "parent_value": float,
    "pinned": bool,
}


def plan_piece(name: str, m, split: Split, value, has, pinned, label, parent_of_child) -> dict:
    """The rows of one measure as arrays: child and horizon column of each cell that gets a row, and its
    value, parent value, basis, fallback and pin flag."""
    child, col = np.nonzero(split.rows)
    par = parent_of_child[child]
    code = split.fallback[child, col]
    is_pin = pinned[child, col]
    return {
        "child": child,
        "col": col,
        "measure": name,
        "rule": m.rule,
        "value": split.value[child, col],
        "parent_value": np.where(has[par, col], value[par, col], np.nan),
        "basis": _basis(label, par, code == EVEN, is_pin),
        "fallback": np.asarray(FALLBACKS, dtype=object)[code],
        "pinned": is_pin,
    }


def _basis(label: np.ndarray, par: np.ndarray, even: np.ndarray, is_pin: np.ndarray) -> np.ndarray:
    """Each row's basis: "pin" where pinned, else "even" where the split fell back to even, else its parent's
    label; chosen on integer codes and taken once from the few labels (no object array per choice)."""
    code, labels = pd.factorize(label, use_na_sentinel=False)  # a parent's label, coded (a handful)
    names = np.concatenate([np.asarray(labels, dtype=object), np.array(["even", "pin"], dtype=object)])
    return names[np.where(is_pin, len(labels) + 1, np.where(even, len(labels), code[par]))]


def plan_table(pieces: list[dict], children: pd.DataFrame, starts: pd.DatetimeIndex, cycle_date) -> pd.DataFrame:
    """The plan (PLAN_COLUMNS, PLAN_TYPES) of the measures' pieces in the order given."""
    pieces = [p for p in pieces if len(p["child"])]
    if not pieces:
        return pd.DataFrame({c: pd.Series(dtype=object) for c in PLAN_COLUMNS}).astype(PLAN_TYPES)
    sizes = [len(p["child"]) for p in pieces]

    def joined(column: str) -> np.ndarray:
        return np.concatenate([p[column] for p in pieces])

    def repeated(column: str) -> np.ndarray:
        return np.repeat(np.array([p[column] for p in pieces], dtype=object), sizes)

    child = joined("child")
    columns = {key: children[key].to_numpy()[child] for key in LEAF}
    columns["period_start"] = pd.DatetimeIndex(starts).to_numpy()[joined("col")]
    columns["cycle_date"] = np.full(len(child), pd.Timestamp(cycle_date).to_datetime64(), dtype="datetime64[ns]")
    columns["measure"] = repeated("measure")
    columns["value"] = joined("value")
    columns["parent_value"] = joined("parent_value")
    columns["rule"] = repeated("rule")
    columns["basis"] = joined("basis")
    columns["fallback"] = joined("fallback")
    columns["pinned"] = joined("pinned")
    # every column made once here and handed over as it is: no copy into blocks, no gather of a frame
    out = pd.DataFrame(columns, copy=False)
    return out.astype(PLAN_TYPES, copy=False)  # the columns already of their type are kept, not copied
