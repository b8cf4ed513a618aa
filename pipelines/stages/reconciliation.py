"""Stage 7, `reconciliation`: proof that the leaf forecast adds up to the parent forecast the strategy produced.

`reconcile` builds one row per parent and period: the parent forecast as the
class's strategy produced it (`strategy_forecast` of `parent_forecast`: the
model's forecast, the reconciled parent or the sum of the active children's
own forecasts, never a sum of the stored leaves), the final parent forecast,
the zero_reason the lifecycle set, and the sum of the stored leaves. The
expected leaf sum is `strategy_forecast`, or 0 in a period the lifecycle set
to 0: those periods are left out of the comparison with the strategy's value
(counted by reason in the metadata) and judged on carrying no volume instead.

Each `find_*` function returns the rows that break one rule (empty = the rule
holds): the blocking checks `children_sum_to_parent` and
`every_active_parent_has_children` (the active parents come from the product
master and the customer spans, `pipelines.engines.proofs`), and the checks of
the forecast's own rows are on the forecast.

Tolerance: a leaf sum (or the final parent) matches its expected value E when
|value - E| <= RELATIVE_TOLERANCE x max(|E|, 1),
i.e. relative to E, with one unit as the floor so that a parent of zero is
judged on an absolute scale instead of dividing by zero.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from pipelines.checks import CHILDREN_SUM_TO_PARENT, EVERY_ACTIVE_PARENT_HAS_CHILDREN, RELATIVE_TOLERANCE
from pipelines.engines.compensated import first_appearance_sums
from pipelines.engines.proofs import find_active_parents_without_children
from pipelines.errors import PlanningError
from pipelines.keys import PARENT, PARENT_ID, any_blank, first_rows, ids_in
from pipelines.results import CheckRows, Log, StageResult, quiet

KEY = PARENT + ["period_start"]
COLUMNS = [
    "cycle_date", "product", "site", "period_start", "parent_forecast", "strategy_forecast", "zero_reason",
    "children_sum", "children", "expected", "difference", "relative_difference",
]


@dataclass(frozen=True)
class ReconciliationSettings:
    """What the proofs read besides the tables: the period kind."""

    period: str

    @classmethod
    def of(cls, config) -> ReconciliationSettings:
        return cls(config.calendar.period)


def reconcile(parent: pd.DataFrame, leaf: pd.DataFrame) -> pd.DataFrame:
    """Per parent and period: the strategy's parent forecast, the final one, and the sum of the stored leaves.

    A parent period without leaves has children_sum 0; leaves without a parent
    row are kept (parent columns blank), so neither side can hide a row.
    """
    if "strategy_forecast" not in parent.columns:
        raise PlanningError(
            "parent_forecast has no strategy_forecast column (a store written by an earlier release): "
            "rebuild statistical_forecast and downstream (`python -m pipelines rebuild --from statistical_forecast`)."
        )
    # grouped on the integer parent id where both tables carry it (the same groups, in the same order)
    # (a group's first row is its first non-blank one where the columns have no blank, as the groupby takes it)
    by_id = ids_in(parent, (PARENT_ID,)) and ids_in(leaf, (PARENT_ID,)) and not any(
        any_blank(leaf[c]) for c in ("period_start", "cycle_date", *PARENT)
    )
    key = [PARENT_ID, "period_start"] if by_id else KEY
    sums = _leaf_sums(leaf) if by_id else (
        leaf.groupby(key, sort=False, observed=True)
        .agg(leaf_cycle_date=("cycle_date", "first"), **{f"leaf_{c}": (c, "first") for c in PARENT},
             children_sum=("forecast", "sum"), children=("forecast", "size"))
        .reset_index()
    )
    out = parent[["cycle_date"] + list(dict.fromkeys(KEY + key)) + ["forecast", "strategy_forecast", "zero_reason"]]
    out = out.rename(columns={"forecast": "parent_forecast"}).merge(sums, on=key, how="outer", sort=False)
    for c in PARENT:  # the parent key of leaves without a parent row
        if f"leaf_{c}" in out.columns:
            out[c] = out[c].fillna(out[f"leaf_{c}"])
    out["cycle_date"] = out["cycle_date"].fillna(out["leaf_cycle_date"])
    out["children_sum"] = out["children_sum"].fillna(0.0)
    out["children"] = out["children"].fillna(0).astype(np.int64)
    out["zero_reason"] = out["zero_reason"].astype(object).where(out["zero_reason"].notna(), None)
    zeroed = out["zero_reason"].notna()
    out["expected"] = np.where(zeroed, 0.0, out["strategy_forecast"].astype(float))
    out["difference"] = out["children_sum"] - out["expected"]
    out["relative_difference"] = out["difference"].abs() / np.maximum(out["expected"].abs(), 1.0)
    return out[COLUMNS].reset_index(drop=True)


def _leaf_sums(leaf: pd.DataFrame) -> pd.DataFrame:
    """Per parent id and period, in order of first appearance: the first row's cycle date and parent key, the
    sum of the leaves' forecasts and their count; the groupby of `reconcile` on one integer code (its sums
    are pandas' own group sums over the same rows in the same order), the other columns from each group's first
    row."""
    when, _ = pd.factorize(leaf["period_start"].to_numpy())
    periods = int(when.max()) + 1 if len(when) else 1  # a shard's empty forecast: no rows, no groups
    key = leaf[PARENT_ID].to_numpy().astype(np.int64) * periods + when
    forecast = leaf["forecast"]
    if forecast.dtype == np.float64:  # groups, first rows, pandas' sums and the counts in one compiled pass
        first, children_sum, children = first_appearance_sums(key, int(key.max()) + 1 if len(key) else 0,
                                                              forecast.to_numpy())
    else:
        group, _ = pd.factorize(key)
        first = first_rows(group)
        children_sum = forecast.groupby(group, sort=False).sum().to_numpy()
        children = np.bincount(group, minlength=len(first)).astype(np.int64)
    out = {c: leaf[c].to_numpy()[first] for c in (PARENT_ID, "period_start")}
    out["leaf_cycle_date"] = leaf["cycle_date"].to_numpy()[first]
    for c in PARENT:
        out[f"leaf_{c}"] = leaf[c].to_numpy()[first]
    out["children_sum"] = children_sum
    out["children"] = children
    return pd.DataFrame(out)


def find_incoherent(reconciliation: pd.DataFrame, tolerance: float = RELATIVE_TOLERANCE) -> pd.DataFrame:
    """Parent periods whose leaves do not sum to the strategy's parent forecast (or to 0 where the lifecycle
    set the period to 0), whose final parent forecast is not that value, or whose leaves have no parent row."""
    r = reconciliation
    zeroed = r["zero_reason"].notna().to_numpy()
    floor = np.maximum(r["expected"].abs().to_numpy(), 1.0)
    no_parent = r["strategy_forecast"].isna().to_numpy()
    leaves_off = ~(r["relative_difference"].to_numpy() <= tolerance)
    parent_off = ~(np.abs(r["parent_forecast"].to_numpy() - r["expected"].to_numpy()) <= tolerance * floor)
    rows = np.flatnonzero(no_parent | leaves_off | parent_off)  # the reasons written for the failing rows only
    no_parent, leaves_off, parent_off, zeroed = no_parent[rows], leaves_off[rows], parent_off[rows], zeroed[rows]
    why = np.select(
        [no_parent, leaves_off & zeroed, leaves_off, parent_off],
        [
            "leaves without a parent_forecast row",
            "leaves carry volume in a period the lifecycle set to 0",
            "leaves do not sum to the strategy's parent forecast",
            "parent forecast differs from the strategy's (or is not 0 where the lifecycle set it to 0)",
        ],
        "",
    )
    return r.iloc[rows].assign(why=why).reset_index(drop=True)


def run(
    parent_forecast: pd.DataFrame,
    statistical_forecast: pd.DataFrame,
    customer_spans: pd.DataFrame,
    products: pd.DataFrame,
    cycle_calendar: pd.DataFrame,
    settings: ReconciliationSettings,
    log: Log = quiet,
) -> StageResult:
    """The reconciliation table and its two blocking checks."""
    table = reconcile(parent_forecast, statistical_forecast)
    zeroed = table["zero_reason"].notna()
    compared = table[~zeroed]
    by_reason = (
        table[zeroed].groupby("zero_reason").agg(
            parent_periods=("expected", "size"), strategy_volume_not_planned=("strategy_forecast", "sum")
        ).reset_index()
    )
    cycle = cycle_calendar.iloc[0]
    figures = {
        "parent_periods_compared_with_strategy_forecast": len(compared),
        "parent_periods_set_to_zero_by_lifecycle": int(zeroed.sum()),
        "set_to_zero_by_reason": by_reason if len(by_reason) else "none",
        "largest_relative_difference": float(compared["relative_difference"].max()) if len(compared) else 0.0,
        "worst_rows": table.sort_values("relative_difference", ascending=False),
    }
    without_children = find_active_parents_without_children(
        parent_forecast,
        statistical_forecast,
        customer_spans,
        products,
        pd.Timestamp(cycle["cycle_date"]),
        int(cycle["horizon"]),
        settings.period,
    )
    return StageResult(
        outputs={"reconciliation": table},
        metadata={"reconciliation": figures},
        checks={
            CHILDREN_SUM_TO_PARENT: CheckRows(
                find_incoherent(table),
                {
                    "compared": f"{len(compared)} parent periods with the strategy's parent forecast; "
                    f"{int(zeroed.sum())} set to 0 by the lifecycle, judged on carrying no volume",
                    "set_to_zero_by_reason": by_reason,
                },
            ),
            EVERY_ACTIVE_PARENT_HAS_CHILDREN: CheckRows(without_children),
        },
    )
