"""Stage `share_drift`: how far each child's share moved since the previous cycle.

Both cycles' share tables are kept in the store (one partition per cycle and
class), so the comparison needs no copy. A child in only one of the two
cycles counts with share 0 in the other (`status` new / gone), so a customer
that appears or leaves shows its full move. The move is in percentage points:
change_pp = 100 x (share_current - share_previous).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from pipelines.checks import SHARE_DRIFT_WITHIN_LIMIT
from pipelines.keys import LEAF
from pipelines.results import CheckRows, Log, StageResult, quiet

DRIFT_COLUMNS = LEAF + [
    "product_class",
    "previous_cycle",
    "share_previous",
    "share_current",
    "change_pp",
    "abs_change_pp",
    "status",
]


def share_drift(current: pd.DataFrame, previous: pd.DataFrame | None, previous_cycle: str | None) -> pd.DataFrame:
    """One row per child of either cycle, biggest moves first.

    `current` / `previous`: share tables (LEAF keys, product_class, share).
    Without a previous cycle the result is empty (there is nothing to compare).
    """
    if previous is None or previous_cycle is None:
        return pd.DataFrame({c: pd.Series(dtype=_dtype(c)) for c in DRIFT_COLUMNS})
    cur = current[LEAF + ["product_class", "share"]].rename(columns={"share": "share_current"})
    prev = previous[LEAF + ["product_class", "share"]].rename(
        columns={"share": "share_previous", "product_class": "class_previous"}
    )
    both = cur.merge(prev, on=LEAF, how="outer", indicator=True)
    both["product_class"] = both["product_class"].fillna(both["class_previous"])
    both["status"] = np.select(
        [both["_merge"] == "left_only", both["_merge"] == "right_only"], ["new", "gone"], default="both"
    )
    both[["share_current", "share_previous"]] = both[["share_current", "share_previous"]].fillna(0.0)
    both["change_pp"] = 100.0 * (both["share_current"] - both["share_previous"])
    both["abs_change_pp"] = both["change_pp"].abs()
    both["previous_cycle"] = previous_cycle
    out = both[DRIFT_COLUMNS].sort_values(
        ["abs_change_pp"] + LEAF, ascending=[False] + [True] * len(LEAF), kind="stable"
    )
    return out.reset_index(drop=True)


def drifted_beyond(drift: pd.DataFrame, threshold_pp: float) -> pd.DataFrame:
    """The children whose share moved more than `threshold_pp` percentage points."""
    return drift[drift["abs_change_pp"] > threshold_pp]


def _dtype(column: str) -> str:
    return "float64" if column.startswith(("share", "change", "abs_")) else "object"


def run(
    share_tables: pd.DataFrame,
    previous: pd.DataFrame | None,
    previous_cycle: str | None,
    settings: float,
    log: Log = quiet,
) -> StageResult:
    """The drift against the previous stored cycle of the class; `settings` is the threshold in percentage points."""
    drift = share_drift(share_tables, previous, previous_cycle)
    moved = drifted_beyond(drift, settings)
    figures = {
        "previous_cycle": previous_cycle or "none (first cycle of this class)",
        "biggest_movers": drift.head(20),
        "children_moved_beyond_threshold": len(moved),
        "largest_move_pp": float(drift["abs_change_pp"].max()) if len(drift) else 0.0,
    }
    extra = {"threshold_pp": f"{settings:g}", "previous_cycle": previous_cycle or "none"}
    return StageResult(
        outputs={"share_drift": drift},
        metadata={"share_drift": figures},
        checks={SHARE_DRIFT_WITHIN_LIMIT: CheckRows(moved, extra)},
    )
