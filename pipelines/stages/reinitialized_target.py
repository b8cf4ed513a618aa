"""Stage 5, `reinitialized_target`: the target measure rewritten from fresh shares, per period.

For every child and every horizon period h:

    target_{j,h} = share_{j,h} x baseline_P,

share_{j,h} being the child's share in period h: the base shares of the
children active in h, renormalised over them (`share_tables.split_shares`;
a child before its first or after its last active period has 0, and a
reference keeps its whole share until its new customer starts). The
established children's weights in h are their history shares, or, for the
per-period share methods `seasonal` and `forecast_proportions`, their basis
of period h (`share_tables.period_basis`, computed here from the lifecycle
history); every lifecycle rule applies on top of these weights. `share_basis`
records per parent and period what the weights came from: `history_share`,
`period_of_year`, `children_forecast`, or `pooled_fallback` where a per-period
method had no basis in the period. Per parent and period the shares sum to 1,
or are all 0 with `zero_reason`:

- `product_not_active` - the product's own span does not cover the period;
- `no_active_child` - no customer span covers it;
- `awaiting_history` - the only active children are new customers without
  a reference or initial share;
- `no_share_among_active` - the active children hold no share (e.g. none of
  them had volume in the window, or their initial shares are 0).

The forecast stage sets such a parent period to 0, so nothing is forecast that
no child could carry.

baseline_P is the parent's mean per period over the window its share used:
the parent's volume in that window divided by the window's periods, or by
fewer periods when the parent's history starts inside the window. Periods
with a recorded shortage (`share_tables.shortage_periods`) are left out of
both: the volume leaves out their rows and the divisor their count. A parent
that fell back to an even split has no volume in any window, so its baseline
is 0.

Because the target is overwritten every cycle, the pro-rata split of the next
forecast follows this cycle's shares, not whatever the children held before.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from pipelines.calendar import horizon_starts, period_ordinal
from pipelines.checks import SHARES_SUM_TO_ONE
from pipelines.engines.period_shares import period_shares, share_steps, stored_basis
from pipelines.engines.proofs import find_shares_not_summing_to_one
from pipelines.engines.share_rows import bin_window_volumes, period_ages, shortage_periods
from pipelines.engines.share_settings import ShareSettings
from pipelines.engines.share_tuning import chosen_rules
from pipelines.keys import LEAF, LEAF_ID, PARENT, PARENT_ID, coded, factorize, first_rows, ids_in, key_rank
from pipelines.results import CheckRows, Log, StageResult, quiet

TARGET_COLUMNS = LEAF + ["period_start", "cycle_date", "target", "share", "parent_baseline", "zero_reason", "basis"]


def parent_baselines(
    shares: pd.DataFrame, history: pd.DataFrame, settings: ShareSettings, cycle_date: pd.Timestamp
) -> np.ndarray:
    """Baseline of each share-table row's parent (same value on all its children).

    Summed per history parent id where both tables carry the ids (each parent's rows in their order, as per
    share-table parent), else per share-table parent; each parent's history length from its runs where the
    history is sorted by parent id (as the lifecycle stage writes it)."""
    period = settings.period
    cycle_ord = int(period_ordinal(pd.DatetimeIndex([cycle_date]), period)[0])
    parent_code, parents = factorize(shares, PARENT)
    n_parents = len(parents)
    window_used = np.zeros(n_parents + 1, dtype=np.int64)  # the last: the rows of no share-table parent
    window_used[parent_code] = shares["window_used"].to_numpy()

    if ids_in(shares, (PARENT_ID,)) and ids_in(history, (PARENT_ID,)):  # bins: the history's parent ids
        row_bin = history[PARENT_ID].to_numpy()
        n_bins = int(row_bin.max()) + 1 if len(row_bin) else 0
        held = shares[PARENT_ID].to_numpy()[first_rows(parent_code)]
        code_of_bin = np.full(n_bins, n_parents, dtype=np.int64)
        code_of_bin[held[held < n_bins]] = np.flatnonzero(held < n_bins)
    else:  # bins: the share-table parents (n_parents: the rows of none)
        row_parent = coded(history).parent_rows(parents)
        row_bin = np.where(row_parent >= 0, row_parent, n_parents)
        n_bins, code_of_bin = n_parents + 1, np.arange(n_parents + 1)
    short = shortage_periods(history, settings.exclude_shortages)
    age = period_ages(history["period_start"], period, cycle_ord)
    qty = history["quantity"].to_numpy(float)
    # each parent's window cut to its history's length, and its volume inside (rows in order: the same sums as a
    # bincount over the rows inside), in compiled passes writing nothing of the history's length
    span, volume = bin_window_volumes(row_bin, age, qty, short, window_used[code_of_bin], n_bins)
    # shortage periods inside the window: distinct (parent, age) pairs, from the shortage rows alone
    at = np.flatnonzero(short)
    bins, ages = row_bin[at].astype(np.int64), age[at].astype(np.int64)
    m = (ages >= 1) & (ages <= span[bins])
    pairs = np.unique(np.stack([bins[m], ages[m]], axis=1), axis=0)
    periods = span - np.bincount(pairs[:, 0], minlength=n_bins)
    by_bin = np.divide(volume, periods, out=np.zeros(n_bins), where=periods > 0)
    baseline = np.zeros(n_parents + 1)
    baseline[code_of_bin] = by_bin  # a bin of no share-table parent lands on the last, unused
    return baseline[parent_code]


def reinitialize_target(
    shares: pd.DataFrame,
    history: pd.DataFrame,
    settings: ShareSettings,
    cycle_date: pd.Timestamp,
    products: pd.DataFrame | None = None,
    period_basis: pd.DataFrame | None = None,
) -> pd.DataFrame:
    """One row per child and horizon period: target = period share x parent baseline.

    period_basis: the cycle's stored period basis (`period_basis` stage); without
    it the per-period methods' basis is computed here from `history`.
    """
    settings = ShareSettings.of(settings)
    period = settings.period
    starts = horizon_starts(cycle_date, settings.horizon, period)
    h = len(starts)
    shares = shares.reset_index(drop=True)
    baseline = parent_baselines(shares, history, settings, cycle_date)
    stored = None if period_basis is None else stored_basis(shares, period_basis, starts)
    share, reason, basis = period_shares(shares, settings, cycle_date, products, history, basis=stored)
    ids = ids_in(shares)  # carried from the share table
    # each column made once, in its place: a leaf's keys repeated per period, no frame taken and reordered
    out = {c: np.repeat(shares[c].to_numpy(), h) for c in LEAF}
    out["period_start"] = np.tile(starts.values, len(shares))
    out["cycle_date"] = np.full(len(shares) * h, cycle_date.to_datetime64().astype("datetime64[ns]"))
    out["share"] = share.ravel()
    out["parent_baseline"] = np.repeat(baseline, h)
    out["target"] = out["share"] * out["parent_baseline"]
    out["zero_reason"] = reason.ravel()
    out["basis"] = basis.ravel()
    out = {c: out[c] for c in TARGET_COLUMNS}
    for c in ids:
        out[c] = np.repeat(shares[c].to_numpy(), h)
    return pd.DataFrame(out, copy=False)


def parents_with_mix_change(
    target: pd.DataFrame,
    shares: pd.DataFrame,
    tolerance: float = 1e-9,
    codes: tuple[np.ndarray, np.ndarray] | None = None,
) -> pd.DataFrame:
    """Parents whose children's shares change inside the horizon, with when and who.

    Columns: product, site, first_change (first period whose shares differ from
    the period before), periods_with_change, phasing_in, phasing_out (customers
    whose share starts or stops inside the horizon), zero_periods. codes: `parent_period_codes(target)`, when
    the caller has them.
    """
    if target.empty:
        return pd.DataFrame(
            columns=PARENT + ["first_change", "periods_with_change", "phasing_in", "phasing_out", "zero_periods"]
        )
    # each leaf's share against its previous period, on integers: the rows in (leaf key, period) order
    when = target["period_start"].to_numpy().view(np.int64)
    share = target["share"].to_numpy(float)
    rows = _changes_in_leaf_runs(target, when, share, tolerance)
    if rows is None:
        leaf, order = key_rank(target, LEAF), None
        step_leaf, step_when = np.diff(leaf), np.diff(when)
        if not bool(np.all((step_leaf > 0) | ((step_leaf == 0) & (step_when >= 0)))):
            order = np.lexsort((when, leaf))  # stable, as a sort by leaf then period
            step_leaf = np.diff(leaf[order])
        share = share if order is None else share[order]
        with np.errstate(invalid="ignore"):
            changed = (step_leaf == 0) & (np.abs(share[1:] - share[:-1]) > tolerance)
        rows = np.flatnonzero(changed) + 1
        rows = rows if order is None else order[rows]
    change = target.iloc[np.sort(rows)][PARENT + ["period_start"]].drop_duplicates()
    per_parent = change.groupby(PARENT, sort=True).agg(
        first_change=("period_start", "min"), periods_with_change=("period_start", "size")
    )
    if per_parent.empty:
        return per_parent.reset_index().assign(phasing_in="", phasing_out="", zero_periods=0)
    start, end = target["period_start"].min(), target["period_start"].max()

    def customers(mask: pd.Series) -> pd.Series:  # per parent key, its customers sorted and joined
        rows = np.flatnonzero(mask.to_numpy())
        named: dict[tuple, list] = {}
        for key in zip(*(shares[c].to_numpy(object)[rows] for c in (*PARENT, "customer")), strict=True):
            named.setdefault(key[:2], []).append(key[2])
        return pd.Series({key: ", ".join(sorted(c)) for key, c in named.items()}, dtype=object)

    in_ = customers((shares["first_active_period"] > start) & (shares["lifecycle_rule"] != "awaiting_history"))
    out_ = customers(shares["last_active_period"] < end)
    zero = target.iloc[first_parent_periods(target, zero_only=True, codes=codes)][PARENT].groupby(PARENT).size()
    per_parent["phasing_in"] = in_.reindex(per_parent.index).fillna("")
    per_parent["phasing_out"] = out_.reindex(per_parent.index).fillna("")
    per_parent["zero_periods"] = zero.reindex(per_parent.index).fillna(0).astype(np.int64)
    return per_parent.reset_index()


def _changes_in_leaf_runs(
    target: pd.DataFrame, when: np.ndarray, share: np.ndarray, tolerance: float
) -> np.ndarray | None:
    """The rows whose share differs by more than `tolerance` from the row before of the same leaf, where the rows
    of each leaf are one run in period order (as `reinitialize_target` writes them), told by the leaf ids in one
    compiled pass (`share_steps`); None otherwise (or without the ids)."""
    if not ids_in(target, (LEAF_ID,)) or len(target) < 2:
        return None
    ids = target[LEAF_ID].to_numpy()
    if ids.min() < 0:
        return None
    in_runs, rows = share_steps(ids, when, share, tolerance, int(ids.max()) + 1)
    return rows if in_runs else None


def parent_period_codes(target: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """(one integer per row naming its parent (product, site) and period, each row has a zero_reason): the
    parent id (or the parent key's code where the table carries no ids) times the periods plus the period's code
    (the same pairs as the text keys), and the reason mask: made once for the figures and the check."""
    parent = target[PARENT_ID].to_numpy(np.int64) if ids_in(target, (PARENT_ID,)) else factorize(target, PARENT)[0]
    when, periods = pd.factorize(target["period_start"].to_numpy())
    return parent * len(periods) + when, target["zero_reason"].notna().to_numpy()


def first_parent_periods(
    target: pd.DataFrame, zero_only: bool = False, codes: tuple[np.ndarray, np.ndarray] | None = None
) -> np.ndarray:
    """Positions of the first row of each parent (product, site) and period in `target`, ascending (the rows
    `drop_duplicates` keeps); zero_only: among the rows with a zero_reason only. Coded on integers; codes:
    `parent_period_codes(target)`, when the caller has them."""
    code, has_reason = codes if codes is not None else parent_period_codes(target)
    rows = np.flatnonzero(has_reason) if zero_only else None
    code = code if rows is None else code[rows]
    if not len(code):
        return np.zeros(0, np.int64)
    first = np.flatnonzero(~pd.Series(code).duplicated().to_numpy())
    return first if rows is None else rows[first]


def run(
    share_tables: pd.DataFrame,
    period_basis: pd.DataFrame,
    lifecycle_history: pd.DataFrame,
    products: pd.DataFrame,
    cycle_calendar: pd.DataFrame,
    settings: ShareSettings,
    log: Log = quiet,
    share_tuning: pd.DataFrame | None = None,
) -> StageResult:
    """The reinitialized target from the stored period basis, its figures and the check that shares sum to one.

    share_tuning: the backtest's choice of window and method for the classes with `auto`.
    """
    settings = chosen_rules(share_tuning, ShareSettings.of(settings))
    cycle_date = pd.Timestamp(cycle_calendar["cycle_date"].iloc[0])
    target = reinitialize_target(share_tables, lifecycle_history, settings, cycle_date, products, period_basis)
    codes = parent_period_codes(target)  # once for the figures and the check
    when = target["period_start"].to_numpy()
    first = np.flatnonzero(when == when.min()) if len(target) else np.zeros(0, np.int64)  # the first period's rows
    mix = parents_with_mix_change(target, share_tables, codes=codes)
    no_baseline = first[target["parent_baseline"].to_numpy()[first] == 0]
    zero = target[["zero_reason"]].iloc[first_parent_periods(target, zero_only=True, codes=codes)]
    if ids_in(target, (PARENT_ID,)):  # one parent id per parent key
        parents_without_baseline = len(pd.unique(target[PARENT_ID].to_numpy()[no_baseline]))
    else:
        parents_without_baseline = int(target[PARENT].iloc[no_baseline].drop_duplicates().shape[0])
    figures = {
        "horizon_periods": settings.horizon,
        "target_total_per_period": float(target["target"].iloc[first].sum()),
        "parents_with_zero_baseline": parents_without_baseline,
        "parents_with_mix_change": mix,
        "parents_with_mix_change_count": len(mix),
        "zero_periods_by_reason": zero.groupby("zero_reason").size().rename("parent_periods").reset_index(),
        "parent_periods_by_basis": target["basis"].iloc[first_parent_periods(target, codes=codes)].value_counts()
        .rename_axis("basis").reset_index(),
    }
    return StageResult(
        outputs={"reinitialized_target": target},
        metadata={"reinitialized_target": figures},
        checks={SHARES_SUM_TO_ONE: CheckRows(find_shares_not_summing_to_one(target, codes=codes))},
    )
