"""Stage 7, `reconciliation`: proof that the leaf forecast adds up to the parent.

`reconcile` builds one row per parent and period. Each `find_*` function
returns the rows that break one rule (empty = the rule holds); the asset
turns them into blocking asset checks with a sample of the rows in metadata.

Tolerance: children sum to the parent when
|children_sum - parent| <= RELATIVE_TOLERANCE x max(|parent|, 1),
i.e. relative to the parent, with one unit as the floor so that a parent of
zero is judged on an absolute scale instead of dividing by zero.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from pipelines.calendar import period_ordinal, span_bounds
from pipelines.keys import LEAF, PARENT, lookup

RELATIVE_TOLERANCE = 1e-9
SHARE_TOLERANCE = 1e-9


def reconcile(parent: pd.DataFrame, leaf: pd.DataFrame) -> pd.DataFrame:
    """Parent forecast against the sum of its children, per parent and period."""
    sums = leaf.groupby(PARENT + ["period_start"], sort=False, observed=True)["forecast"].agg(children_sum="sum", children="size")
    out = parent[["cycle_date"] + PARENT + ["period_start", "forecast"]].rename(columns={"forecast": "parent_forecast"})
    out = out.join(sums, on=PARENT + ["period_start"])
    out["children_sum"] = out["children_sum"].fillna(0.0)
    out["children"] = out["children"].fillna(0).astype(np.int64)
    out["difference"] = out["children_sum"] - out["parent_forecast"]
    out["relative_difference"] = out["difference"].abs() / np.maximum(out["parent_forecast"].abs(), 1.0)
    return out.reset_index(drop=True)


def find_incoherent(reconciliation: pd.DataFrame, tolerance: float = RELATIVE_TOLERANCE) -> pd.DataFrame:
    """Parent periods whose children do not sum to the parent within the tolerance."""
    return reconciliation[reconciliation["relative_difference"] > tolerance]


def find_shares_not_summing_to_one(shares: pd.DataFrame, tolerance: float = SHARE_TOLERANCE) -> pd.DataFrame:
    """Parents whose shares do not sum to 1."""
    sums = shares.groupby(PARENT, sort=True, observed=True)["share"].agg(share_sum="sum", children="size").reset_index()
    return sums[(sums["share_sum"] - 1.0).abs() > tolerance]


def find_volume_after_phase_out(leaf: pd.DataFrame, spans: pd.DataFrame, period: str) -> pd.DataFrame:
    """Leaf forecast rows with volume in a period after the customer's span ended."""
    _, to_ord = span_bounds(spans, period)
    pos = lookup(leaf, LEAF, spans)
    end = np.where(pos >= 0, to_ord[np.clip(pos, 0, None)], np.nan)
    with np.errstate(invalid="ignore"):
        after = (period_ordinal(leaf["period_start"], period) > end) & (leaf["forecast"].to_numpy() != 0)
    out = leaf.loc[after, LEAF + ["period_start", "forecast"]].copy()
    out["active_to"] = spans["active_to"].to_numpy()[pos[after]] if after.any() else pd.Series(dtype="datetime64[ns]")
    return out


def find_negative(frame: pd.DataFrame, column: str = "forecast") -> pd.DataFrame:
    """Rows with a negative value."""
    return frame[frame[column] < 0]


def find_parents_without_children(reconciliation: pd.DataFrame) -> pd.DataFrame:
    """Active parents (with a forecast row) that have no child to carry it."""
    none = reconciliation[reconciliation["children"] == 0]
    return none.groupby(PARENT, sort=True, observed=True).agg(periods=("period_start", "size"), parent_forecast=("parent_forecast", "sum")).reset_index()
