"""Stage 7, `reconciliation`: proof that the leaf forecast adds up to the parent.

`reconcile` builds one row per parent and period. Each `find_*` function
returns the rows that break one rule (empty = the rule holds): the blocking
checks `children_sum_to_parent` and `every_active_parent_has_children` of the
reconciliation (the checks of the forecast's own rows are on the forecast,
`pipelines.engines.proofs`).

Tolerance: children sum to the parent when
|children_sum - parent| <= RELATIVE_TOLERANCE x max(|parent|, 1),
i.e. relative to the parent, with one unit as the floor so that a parent of
zero is judged on an absolute scale instead of dividing by zero.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from pipelines.checks import CHILDREN_SUM_TO_PARENT, EVERY_ACTIVE_PARENT_HAS_CHILDREN, RELATIVE_TOLERANCE
from pipelines.keys import PARENT
from pipelines.results import CheckRows, Log, StageResult, quiet


def reconcile(parent: pd.DataFrame, leaf: pd.DataFrame) -> pd.DataFrame:
    """Parent forecast against the sum of its children, per parent and period."""
    sums = leaf.groupby(PARENT + ["period_start"], sort=False, observed=True)["forecast"].agg(
        children_sum="sum", children="size"
    )
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


def find_parents_without_children(reconciliation: pd.DataFrame) -> pd.DataFrame:
    """Active parents (with a forecast row) that have no child to carry it."""
    none = reconciliation[reconciliation["children"] == 0]
    return (
        none.groupby(PARENT, sort=True, observed=True)
        .agg(periods=("period_start", "size"), parent_forecast=("parent_forecast", "sum"))
        .reset_index()
    )


def run(
    parent_forecast: pd.DataFrame, statistical_forecast: pd.DataFrame, settings=None, log: Log = quiet
) -> StageResult:
    """The reconciliation table and its two blocking checks."""
    table = reconcile(parent_forecast, statistical_forecast)
    figures = {
        "largest_relative_difference": float(table["relative_difference"].max()) if len(table) else 0.0,
        "worst_rows": table.sort_values("relative_difference", ascending=False),
    }
    return StageResult(
        outputs={"reconciliation": table},
        metadata={"reconciliation": figures},
        checks={
            CHILDREN_SUM_TO_PARENT: CheckRows(find_incoherent(table)),
            EVERY_ACTIVE_PARENT_HAS_CHILDREN: CheckRows(find_parents_without_children(table)),
        },
    )
