"""Stage `period_basis`: the per-period weights of the per-period share methods, decided once a cycle.

For the classes whose share method gives a share per horizon period
(`seasonal`, `children_forecast`), each child's weight in every horizon
period and what it came from (`period_of_year`, `children_forecast`, or
`pooled_fallback` where the parent has no basis in the period); the method
and its sources are in `pipelines.engines.period_shares`. `children_forecast`
runs the class's models on every established child here, once; the
reinitialized target and, through it, the forecast and the plan read the
stored table. Classes with one share per child have no rows: their weight is
the share table's history share in every period.
"""

from __future__ import annotations

import pandas as pd

from pipelines.calendar import horizon_starts
from pipelines.engines.period_shares import basis_table, period_basis
from pipelines.engines.share_settings import ShareSettings
from pipelines.engines.share_tuning import chosen_rules
from pipelines.results import Log, StageResult, quiet


def run(
    share_tables: pd.DataFrame,
    lifecycle_history: pd.DataFrame,
    cycle_calendar: pd.DataFrame,
    settings: ShareSettings,
    log: Log = quiet,
    share_tuning: pd.DataFrame | None = None,
) -> StageResult:
    """The period basis table (empty when no class has a per-period method).

    share_tuning: the backtest's choice of window and method for the classes with `auto`.
    """
    settings = chosen_rules(share_tuning, ShareSettings.of(settings))
    cycle_date = pd.Timestamp(cycle_calendar["cycle_date"].iloc[0])
    shares = share_tables.reset_index(drop=True)
    starts = horizon_starts(cycle_date, settings.horizon, settings.period)
    weight, basis = period_basis(shares, lifecycle_history, settings, cycle_date, len(starts))
    table = basis_table(shares, weight, basis, starts)
    by_basis = table.drop_duplicates(["product", "site", "period_start"])["basis"].value_counts()
    figures = {"parent_periods_by_basis": by_basis.rename_axis("basis").rename("parent_periods").reset_index()}
    return StageResult(outputs={"period_basis": table}, metadata={"period_basis": figures})
