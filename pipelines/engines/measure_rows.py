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
    """What the plan takes from one measure's split: its (children x horizon) cells that get a row, their
    values, fallback codes and pin flags, and its parents' values and labels; `plan_table` reads the rows
    straight into the plan's columns."""
    return {
        "measure": name,
        "rule": m.rule,
        "rows": split.rows,
        "value": split.value,
        "fallback": split.fallback,
        "pinned": pinned,
        "parent": np.where(has, value, np.nan),  # (n_parents, H): NaN where the parent period has no value
        "label": label,
        "parent_of_child": parent_of_child,
    }


def _basis_names(label: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Each parent's label coded (a handful of labels), and the names of the codes: the labels, then "even"
    and "pin"; a row's basis is "pin" where pinned, else "even" where the split fell back to even, else its
    parent's label, chosen on these integer codes (no object array per choice)."""
    code, labels = pd.factorize(label, use_na_sentinel=False)
    return code, np.concatenate([np.asarray(labels, dtype=object), np.array(["even", "pin"], dtype=object)])


def plan_table(pieces: list[dict], children: pd.DataFrame, starts: pd.DatetimeIndex, cycle_date) -> pd.DataFrame:
    """The plan (PLAN_COLUMNS, PLAN_TYPES) of the measures' pieces in the order given.

    Every column is made once at the plan's length. The leaf keys in one pass each, repeating every
    measure's children by their rows' count, and the measure and rule by repeating the names (no object
    column filled with None first, no index per row). The others are allocated once and each measure's
    cells compressed by its rows straight into its slice (`np.compress(..., out=)`; child-major: the rows
    follow the sorted children, then the period); basis and fallback are chosen on small integer codes of
    the measure's cells, compressed, then taken into the slice (`np.take(..., out=)`: the codes are the
    pieces' own, so always in range, and `mode="clip"` writes into `out` directly, where numpy buffers
    `out` under its default `mode="raise"`).
    """
    counts = [int(np.count_nonzero(p["rows"])) for p in pieces]
    total = sum(counts)
    if not total:
        return pd.DataFrame({c: pd.Series(dtype=object) for c in PLAN_COLUMNS}).astype(PLAN_TYPES)
    per_child = np.concatenate([np.count_nonzero(p["rows"], axis=1) for p in pieces])  # measure by measure
    columns = {key: np.repeat(np.tile(children[key].to_numpy(object), len(pieces)), per_child) for key in LEAF}
    del per_child
    starts_ns = pd.DatetimeIndex(starts).to_numpy().astype("datetime64[ns]")
    columns["period_start"] = np.empty(total, dtype="datetime64[ns]")
    columns["cycle_date"] = np.full(total, pd.Timestamp(cycle_date).to_datetime64(), dtype="datetime64[ns]")
    columns["measure"] = np.repeat(np.array([p["measure"] for p in pieces], dtype=object), counts)
    for name in ("value", "parent_value"):
        columns[name] = np.empty(total)
    columns["rule"] = np.repeat(np.array([p["rule"] for p in pieces], dtype=object), counts)
    columns["basis"] = np.empty(total, dtype=object)
    columns["fallback"] = np.empty(total, dtype=object)
    columns["pinned"] = np.empty(total, dtype=bool)
    fallbacks = np.asarray(FALLBACKS, dtype=object)
    end = 0
    for p, k in zip(pieces, counts, strict=True):  # a handful of measures
        if not k:
            continue
        at = slice(end, end + k)
        end += k
        rows = p["rows"]
        n, h = rows.shape
        cells = rows.ravel()
        period = np.compress(cells, np.broadcast_to(np.arange(h, dtype=np.int16), (n, h)))
        np.take(starts_ns, period.astype(np.intp), out=columns["period_start"][at], mode="clip")
        del period
        np.compress(cells, p["value"], out=columns["value"][at])
        parent_of_child = p["parent_of_child"]
        np.compress(cells, np.take(p["parent"], parent_of_child, axis=0), out=columns["parent_value"][at])
        np.compress(cells, p["pinned"], out=columns["pinned"][at])
        code = np.compress(cells, p["fallback"]).astype(np.intp)
        np.take(fallbacks, code, out=columns["fallback"][at], mode="clip")
        del code
        label_code, names = _basis_names(p["label"])
        # the basis of a cell: "pin" where pinned, else "even" where the split fell back to even, else its
        # parent's label; chosen on the cells, then compressed
        choice = np.repeat(label_code[parent_of_child].astype(np.int16)[:, None], h, axis=1)
        choice[p["fallback"] == EVEN] = len(names) - 2
        choice[p["pinned"]] = len(names) - 1
        np.take(names, np.compress(cells, choice).astype(np.intp), out=columns["basis"][at], mode="clip")
    columns = {c: columns[c] for c in PLAN_COLUMNS}
    out = pd.DataFrame(columns, copy=False)  # the arrays as they are: no copy into blocks
    return out.astype(PLAN_TYPES, copy=False)  # the columns already of their type are kept, not copied
