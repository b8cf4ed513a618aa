"""Stage 2, `cleaned_history`: raw lines to one clean value per leaf and period.

Rules, in the order they run:

1. **Rejection.** A line is rejected, with the first reason that applies, when
   the reader could not split it (`too_many_fields`, `too_few_fields`,
   `line_too_long`, `control_characters`: its `read_error`), a key is blank
   (`missing_key`), its date does not parse (`bad_date`; a date-time with a
   UTC offset counts for the date as written, `pipelines.stages.plausible`),
   its quantity is not a finite number (`bad_quantity`) or is larger in size
   than `inputs.plausible.max_abs_quantity` (`quantity_out_of_bounds`: a
   typing slip of 1e12 is neither netted to zero nor forecast), its product is
   not in the product master (`unknown_product`), its product x site x
   customer has no customer span (`no_customer_span`), the same keys, date and
   quantity are in an earlier history file (`duplicate_of_other_file`: history
   given twice), it is dated more than `years_before_cycle` before the cycle
   date (`date_before_window`) or `years_after_cycle` or more after it
   (`date_after_window`), it lies in an isolated group at the start of the
   history (`isolated_date`: `plausible.trusted_extent`, so a lone old line
   does not stretch the history), or it falls on or after the cycle date
   (`on_or_after_cycle_date`). With `calendar.cycle_date:
   latest_complete_period` the cycle date is the period after the trusted end
   of the lines left. Raw lines = used lines + rejected lines.
2. **Bucketing.** Each line goes to the period containing its date (ISO week
   from Monday, or calendar month); lines of one leaf and period are summed,
   returns (negative lines) included, so a return nets against the same
   customer's shipments of that period.
3. **Returns rule `net_then_zero`.** A period whose net is negative is set to
   zero; the negative net is a correction row (`negative_net_to_zero`).
4. **Missing periods.** Inside a series' range - from its customer span start
   (or its first line when the span has no start, never before the first
   history period) to its span end (or the period before the cycle date) - a
   period without lines is filled with zero (`filled`).
5. **Shortage flags.** A row of the optional `shortages` input (product, site,
   any day of a period) flags that period on every child (customer series) of
   the product x site that has a value there: column `shortage`. A record on a
   product x site without history, or outside the history, flags nothing; the
   result's `shortage_periods` table lists every record with the children it
   flagged.
6. **Outliers**, per product class: the class's `outliers` block, else
   `cleansing.outliers` (the block replaces the default as a whole). Shortage
   periods are never judged and are left out of every window, so a stock-out is
   neither a low outlier nor the background a spike is judged against. All
   statistics are over a centred window of `window` periods, truncated at the
   ends of the grid and skipping periods without a value.

   - `hampel` (Hampel 1974; scale 1.4826 x MAD as in Leys et al. 2013): a value
     with |x_t - m_t| > k * 1.4826 * MAD_t, where m_t is the window median.
     Where MAD_t = 0 nothing is flagged: an intermittent series whose window is
     mostly zeros has no spread to judge a spike by. Correction rule `hampel_cap`.
   - `tukey` (Tukey 1977, fences): a value above Q3_t + c * IQR_t (or below
     Q1_t - c * IQR_t), c = `fence`, IQR_t = Q3_t - Q1_t. Quartiles by linear
     interpolation between order statistics: Hyndman & Fan (1996) type 7, the
     default of `numpy.percentile` and of pandas' `quantile`. Tukey's own
     hinges can differ slightly from type-7 quartiles in small windows. Where
     IQR_t = 0 nothing is flagged, for the same reason as MAD_t = 0. Correction
     rule `tukey_cap`.
   - `none`: no outlier rule.

   `sides: upper` (default) flags only values above the upper limit: a low week
   of shipments is more often a supply gap than low demand. `sides: both` is the
   symmetric rule as published. A flagged value is replaced by the limit it
   crossed (`replace_with: limit`) or by the window median (`median`), never
   below zero.

   **Seasonal adjustment** (`seasonal_adjust: auto`, the default): for a class
   whose `models.seasonal` is true, a series with at least two full seasons (m =
   52 weeks or 12 months) is judged on x - s, where s is the seasonal component
   of a classical additive decomposition (as in statsmodels'
   `seasonal_decompose`; Kendall & Stuart, Makridakis et al. 1998, ch. 3): trend
   = centred moving average of order m (a 2 x m MA for even m), NaN where its
   window lacks a value; seasonal index = mean of the detrended values x - trend
   at each position of the season, centred to sum 0; s = that index repeated.
   Shortage periods keep their value in the trend but are left out of the
   index. "Two full seasons" means every position of the season has a detrended
   value, which for a series without gaps is exactly 2m periods or more; a
   shorter series is judged unadjusted (`seasonal_adjusted: false` in its
   correction rows). The limits apply to x - s and s is added back to the
   replacement (limit + s_t or median + s_t). The decomposition is not robust:
   a spike adds 1 / (number of seasons) of itself to its position's index.
7. **Shortage handling** (`cleansing.shortages`):

   - `exclude` (default): the values stay as shipped and `shortage` travels on.
     Contract for the later stages: lifecycle_history carries `shortage`, and
     the share tables and the parent baseline leave flagged periods out of their
     sums, so a stock-out does not take a customer's share away.
   - `fill_baseline`: the value of every flagged child period is replaced by
     the child's rolling median of its NON-shortage periods in the class's
     outlier window (after the outlier rule; on x - s with s added back where
     the series is seasonally adjusted), never below zero. A correction row
     `shortage_fill` records the window, the median and how many periods it
     came from. Where the window holds no non-shortage value the period keeps
     its value and its flag.

Every correction is one row of `history_corrections`; where rules chain on one
period (returns then an outlier limit, returns then a shortage fill) each rule
applied is its own row, in order, each `before` the previous row's `after`. So
per series, sum(raw_quantity) + sum(delta of corrections) = sum(quantity).
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from pipelines.calendar import (
    horizon_starts,
    ordinal_to_start,
    period_ordinal,
    period_start,
    resolve_cycle_date,
    season_length,
    span_bounds,
)
from pipelines.config import LATEST_COMPLETE_PERIOD, OutlierConfig, PlanningConfig
from pipelines.keys import LEAF, PARENT, factorize, lookup
from pipelines.stages.plausible import gap_periods, parse_dates, trusted_extent, year_outside

MAD_SCALE = 1.4826  # 1 / Phi^-1(3/4): makes the MAD consistent for the normal sd (Leys et al. 2013)
CHUNK_CELLS = 4_000_000  # window cells per block of rows: bounds the memory of the rolling statistics


@dataclass(frozen=True)
class CleaningResult:
    cleaned: pd.DataFrame
    rejected: pd.DataFrame
    corrections: pd.DataFrame
    cycle_date: pd.Timestamp
    # per product class: the outlier rule used and how many series were seasonally adjusted
    outlier_rules: pd.DataFrame = field(default_factory=pd.DataFrame)
    # per shortage record (bucketed to its period): the children it flagged
    shortage_periods: pd.DataFrame = field(default_factory=pd.DataFrame)


def reject_lines(
    raw: pd.DataFrame, products: pd.DataFrame, spans: pd.DataFrame, config: PlanningConfig
) -> tuple[pd.DataFrame, pd.DataFrame, pd.Timestamp]:
    """Split raw lines into usable lines (parsed) and rejected lines (with reason).

    Returns (used, rejected, cycle_date). `used` has the leaf keys, `ordinal`
    (period number) and `quantity` (float). The reasons, first that applies:
    the reader's (`read_error`), `missing_key`, `bad_date`, `bad_quantity`,
    `quantity_out_of_bounds`, `unknown_product`, `no_customer_span`,
    `duplicate_of_other_file`, `date_before_window`, `date_after_window`,
    `isolated_date`, `on_or_after_cycle_date` (module docstring, rule 1).
    """
    period = config.calendar.period
    plausible = config.inputs.plausible
    keys = raw[LEAF]
    reason = pd.Series(pd.NA, index=raw.index, dtype=object)

    def mark(mask, why) -> None:
        mask = np.asarray(mask, dtype=bool)
        reason[mask & reason.isna().to_numpy()] = why

    if "read_error" in raw.columns:
        read_error = raw["read_error"].astype(str)
        for why in pd.unique(read_error[read_error != ""]):
            mark((read_error == why).to_numpy(), why)
    mark((keys == "").any(axis=1), "missing_key")
    dates = parse_dates(raw["period_start"])
    # a date pandas cannot hold (year 9999) is still a date, outside the window: looked for among the unparsed only
    outside = np.zeros(len(raw), dtype=np.int64)
    unparsed = dates.isna().to_numpy()
    if unparsed.any():
        outside[unparsed] = year_outside(raw["period_start"][unparsed])
    mark(dates.isna().to_numpy() & (outside == 0), "bad_date")
    qty = pd.to_numeric(raw["quantity"], errors="coerce").to_numpy(dtype=float, na_value=np.nan)
    mark(~np.isfinite(qty), "bad_quantity")
    mark(np.abs(np.nan_to_num(qty, nan=0.0, posinf=0.0, neginf=0.0)) > plausible.max_abs_quantity, "quantity_out_of_bounds")
    mark(~raw["product"].isin(products["product"]), "unknown_product")
    span_index = pd.MultiIndex.from_frame(spans[LEAF])
    mark(~pd.MultiIndex.from_frame(keys).isin(span_index), "no_customer_span")
    mark(_repeated_in_earlier_file(raw, dates, qty, reason.isna().to_numpy()), "duplicate_of_other_file")

    # the cycle date: given, or the period after the trusted end of the usable lines
    ok = reason.isna().to_numpy() & dates.notna().to_numpy()
    ordinals = np.full(len(raw), np.iinfo(np.int64).min, dtype=np.int64)
    if ok.any():
        ordinals[ok] = period_ordinal(period_start(dates[ok], period), period)
    gap = gap_periods(plausible.isolation_gap_years, period)
    last = None
    if ok.any() and config.calendar.cycle_date == LATEST_COMPLETE_PERIOD:
        _, last_ord = trusted_extent(ordinals[ok], gap)
        last = ordinal_to_start(np.array([last_ord]), period)[0]
    cycle_date = resolve_cycle_date(config.calendar.cycle_date, last, period, str(config.source))
    cycle_ord = int(period_ordinal(pd.DatetimeIndex([cycle_date]), period)[0])

    # plausible dates: inside the window around the cycle date, not cut off from the rest of the history
    lowest = cycle_date - pd.Timedelta(days=round(plausible.years_before_cycle * 365.2425))
    highest = cycle_date + pd.Timedelta(days=round(plausible.years_after_cycle * 365.2425))
    with np.errstate(invalid="ignore"):
        mark((dates < lowest).to_numpy() | (outside < 0), "date_before_window")
        mark((dates >= highest).to_numpy() | (outside > 0), "date_after_window")
    history = reason.isna().to_numpy() & (ordinals < cycle_ord) & dates.notna().to_numpy()
    if history.any():
        first_ord, _ = trusted_extent(ordinals[history], gap, trim_end=False)
        mark(history & (ordinals < first_ord), "isolated_date")
    mark(reason.isna().to_numpy() & dates.notna().to_numpy() & (ordinals >= cycle_ord), "on_or_after_cycle_date")

    ok = reason.isna().to_numpy()
    used = raw.loc[ok, LEAF].reset_index(drop=True)
    used["ordinal"] = ordinals[ok]
    used["quantity"] = qty[ok]
    rejected = raw.loc[~ok].drop(columns=["read_error"], errors="ignore").copy()
    rejected["reason"] = reason[~ok].astype(str)
    return used, rejected.reset_index(drop=True), cycle_date


def _repeated_in_earlier_file(raw: pd.DataFrame, dates: pd.Series, qty: np.ndarray, candidate: np.ndarray) -> np.ndarray:
    """True for a line whose keys, date and quantity (parsed) are those of a line of an earlier file.

    Files come in the order they were read (sorted by name); repeats inside one
    file are separate shipments and stay. Only `candidate` lines are compared.
    """
    out = np.zeros(len(raw), dtype=bool)
    if "source_file" not in raw.columns or raw["source_file"].nunique() < 2 or not candidate.any():
        return out
    file_code = pd.factorize(raw["source_file"])[0]
    lines = raw.loc[candidate, LEAF].assign(date=dates[candidate].to_numpy(), qty=qty[candidate], file=file_code[candidate])
    first = lines.groupby(LEAF + ["date", "qty"], sort=False, dropna=False)["file"].transform("min").to_numpy()
    out[np.flatnonzero(candidate)[lines["file"].to_numpy() > first]] = True
    return out


def _rolling(matrix: np.ndarray, window: int, stats, chunk_cells: int = CHUNK_CELLS) -> list[np.ndarray]:
    """Centred rolling statistics of each row of `matrix` (n_series, n_periods), NaN = no value.

    `stats(windows)` gets the windows of a block of rows, shape (rows, n_periods,
    window), NaN-padded at both ends, and returns a tuple of (rows, n_periods)
    arrays. Rows are processed in blocks of about `chunk_cells` window cells, so
    memory stays bounded; this is a loop over blocks of rows, not over series.
    """
    half = window // 2
    n, t = matrix.shape
    out: list[np.ndarray] | None = None
    step = max(1, chunk_cells // max(1, t * window))
    for lo in range(0, max(n, 1), step):  # an empty matrix still runs once, to shape the outputs
        block = np.pad(matrix[lo : lo + step], ((0, 0), (half, window - 1 - half)), constant_values=np.nan)
        win = np.lib.stride_tricks.sliding_window_view(block, window, axis=1)
        result = stats(win)
        if out is None:
            out = [np.full((n, t), np.nan) for _ in result]
        for o, r in zip(out, result):
            o[lo : lo + step] = r
    return out


def _sorted_quantile(s: np.ndarray, n: np.ndarray, p: float) -> np.ndarray:
    """Quantile p of the first n values of each sorted window (NaN where n = 0).

    Linear interpolation between order statistics, Hyndman & Fan (1996) type 7:
    h = (n - 1) p, q = x[floor h] + (h - floor h) (x[floor h + 1] - x[floor h]);
    numpy.percentile's default method "linear".
    """
    h = np.maximum(n - 1, 0) * p
    lo = np.floor(h).astype(np.int64)
    hi = np.minimum(lo + 1, np.maximum(n - 1, 0))
    a = np.take_along_axis(s, lo[..., None], axis=-1)[..., 0]
    b = np.take_along_axis(s, hi[..., None], axis=-1)[..., 0]
    with np.errstate(invalid="ignore"):
        q = a + (h - lo) * (b - a)
    return np.where(n > 0, q, np.nan)


def _rolling_nanmedian(windows: np.ndarray) -> np.ndarray:
    """Median over the last axis ignoring NaN (NaN where a window is all NaN).

    np.sort puts NaN last, so the valid values of each window are its first n.
    """
    s = np.sort(windows, axis=-1)
    n = np.sum(~np.isnan(windows), axis=-1)
    lo = np.clip((n - 1) // 2, 0, None)
    hi = np.clip(n // 2, 0, None)
    a = np.take_along_axis(s, lo[..., None], axis=-1)[..., 0]
    b = np.take_along_axis(s, hi[..., None], axis=-1)[..., 0]
    med = (a + b) / 2.0
    med[n == 0] = np.nan
    return med


def hampel(matrix: np.ndarray, window: int, k: float = 3.0, chunk_cells: int = CHUNK_CELLS) -> tuple[np.ndarray, np.ndarray]:
    """Rolling centred median and MAD of each row of `matrix` (NaN = no value).

    matrix: (n_series, n_periods). Returns (median, mad), both that shape; the
    window is truncated at the edges (min one value). `k` is not used here (the
    limits are `hampel_limits`); it stays for callers that pass it.
    """

    def median_mad(win):
        med = _rolling_nanmedian(win)
        return med, _rolling_nanmedian(np.abs(win - med[..., None]))

    med, mad = _rolling(matrix, window, median_mad, chunk_cells)
    return med, mad


def tukey(matrix: np.ndarray, window: int, chunk_cells: int = CHUNK_CELLS) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Rolling centred first quartile, median and third quartile of each row (type 7).

    matrix: (n_series, n_periods), NaN = no value. Returns (q1, median, q3), each
    that shape; windows truncated at the edges like `hampel`.
    """

    def quartiles(win):
        s = np.sort(win, axis=-1)
        n = np.sum(~np.isnan(win), axis=-1)
        return _sorted_quantile(s, n, 0.25), _sorted_quantile(s, n, 0.5), _sorted_quantile(s, n, 0.75)

    q1, med, q3 = _rolling(matrix, window, quartiles, chunk_cells)
    return q1, med, q3


def rolling_median(matrix: np.ndarray, window: int, chunk_cells: int = CHUNK_CELLS) -> tuple[np.ndarray, np.ndarray]:
    """Rolling centred median of each row ignoring NaN, and the number of values it came from."""

    def median_count(win):
        return _rolling_nanmedian(win), np.sum(~np.isnan(win), axis=-1).astype(float)

    med, count = _rolling(matrix, window, median_count, chunk_cells)
    return med, count


def hampel_limits(
    values: np.ndarray, med: np.ndarray, mad: np.ndarray, rule: OutlierConfig, seasonal: np.ndarray | float = 0.0
) -> tuple[np.ndarray, np.ndarray]:
    """(flagged, replacement) for each value under the Hampel rule.

    `values`, `med` and `mad` are on the judged scale (x - s for a seasonally
    adjusted series); `seasonal` (s) is added back to the replacement, which is
    never below zero.
    """
    spread = rule.k * MAD_SCALE * mad
    with np.errstate(invalid="ignore"):
        deviation = values - med if rule.sides == "upper" else np.abs(values - med)
        flagged = (mad > 0) & (deviation > spread)
    if rule.replace_with == "median":
        replacement = med
    else:
        replacement = np.where(values > med, med + spread, med - spread)
    return flagged, np.clip(replacement + seasonal, 0.0, None)


def tukey_fences(q1: np.ndarray, q3: np.ndarray, fence: float) -> tuple[np.ndarray, np.ndarray]:
    """Tukey's fences (Tukey 1977): Q1 - fence * IQR and Q3 + fence * IQR."""
    iqr = q3 - q1
    return q1 - fence * iqr, q3 + fence * iqr


def tukey_limits(
    values: np.ndarray, q1: np.ndarray, med: np.ndarray, q3: np.ndarray, rule: OutlierConfig, seasonal: np.ndarray | float = 0.0
) -> tuple[np.ndarray, np.ndarray]:
    """(flagged, replacement) for each value under Tukey's fences; scales as in `hampel_limits`."""
    lower, upper = tukey_fences(q1, q3, rule.fence)
    with np.errstate(invalid="ignore"):
        high = values > upper
        flagged = (q3 - q1 > 0) & (high | ((values < lower) if rule.sides == "both" else False))
    if rule.replace_with == "median":
        replacement = med
    else:
        replacement = np.where(high, upper, lower)
    return flagged, np.clip(replacement + seasonal, 0.0, None)


def seasonal_component(
    matrix: np.ndarray, period: int, exclude: np.ndarray | None = None, chunk_cells: int = CHUNK_CELLS
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Seasonal component of a classical additive decomposition, for every row at once.

    matrix: (n_series, n_periods), NaN = no value; `period` m: periods per season.
    Trend: centred moving average of order m (weights 1/2m, 1/m, ..., 1/m, 1/2m
    over m + 1 periods when m is even), NaN where its window lacks a value.
    Seasonal index: mean of the detrended values x - trend at each position of
    the season (column mod m), leaving out the cells of `exclude`, centred to sum
    0; the component repeats the index. This is the decomposition of
    statsmodels' `seasonal_decompose(x, model="additive", period=m)` on a series
    without gaps. A row where some position has no detrended value (fewer than
    two full seasons) gets a zero component.

    Returns (seasonal, adjusted, trend): seasonal and trend (n_series,
    n_periods), adjusted (n_series,) bool.
    """
    if period % 2 == 0:
        weights = np.r_[0.5, np.ones(period - 1), 0.5] / period
    else:
        weights = np.full(period, 1.0 / period)
    n, t = matrix.shape
    if t == 0 or n == 0:
        return np.zeros((n, t)), np.zeros(n, dtype=bool), np.full((n, t), np.nan)
    (trend,) = _rolling(matrix, len(weights), lambda win: (win @ weights,), chunk_cells)
    detrended = matrix - trend
    if exclude is not None:
        detrended = np.where(exclude, np.nan, detrended)
    seasons = -(-t // period)
    padded = np.full((n, seasons * period), np.nan)
    padded[:, :t] = detrended
    padded = padded.reshape(n, seasons, period)
    count = np.sum(~np.isnan(padded), axis=1)
    adjusted = (count > 0).all(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        index = np.nansum(padded, axis=1) / count
    index = np.where(adjusted[:, None], index - np.nanmean(np.where(adjusted[:, None], index, 0.0), axis=1, keepdims=True), 0.0)
    seasonal = index[:, np.arange(t) % period]
    return seasonal, adjusted, trend


@dataclass(frozen=True)
class _Judged:
    """The outcome of one outlier rule on one class: flags, replacements and per-cell figures."""

    flagged: np.ndarray
    replacement: np.ndarray
    figures: dict[str, np.ndarray]


def judge_outliers(judged: np.ndarray, rule: OutlierConfig, seasonal: np.ndarray | float = 0.0) -> _Judged:
    """Apply `rule` to `judged` (x - s, NaN where a period is not judged); replacements on the x scale."""
    if rule.rule == "hampel":
        med, mad = hampel(judged, rule.window)
        flagged, replacement = hampel_limits(judged, med, mad, rule, seasonal)
        figures = {"median": med, "limit_scale": rule.k * MAD_SCALE * mad}
    elif rule.rule == "tukey":
        q1, med, q3 = tukey(judged, rule.window)
        flagged, replacement = tukey_limits(judged, q1, med, q3, rule, seasonal)
        lower, upper = tukey_fences(q1, q3, rule.fence)
        figures = {"q1": q1, "median": med, "q3": q3, "lower": lower, "upper": upper}
    else:
        empty = np.zeros(judged.shape, dtype=bool)
        return _Judged(empty, np.asarray(judged, dtype=float), {})
    return _Judged(flagged & ~np.isnan(judged), replacement, figures)


def _rule_parameters(rule: OutlierConfig) -> dict:
    params = {"window": rule.window}
    if rule.rule == "hampel":
        params["k"] = rule.k
    elif rule.rule == "tukey":
        params["fence"] = rule.fence
    return params | {"replace_with": rule.replace_with, "sides": rule.sides, "seasonal_adjust": rule.seasonal_adjust}


def _shortage_cells(
    shortages: pd.DataFrame | None, leaves: pd.DataFrame, keep: np.ndarray, first_ord: int, period: str
) -> tuple[np.ndarray, pd.DataFrame]:
    """Boolean (n_leaves, n_periods) of kept cells whose product x site has a shortage that period.

    Also the shortage records bucketed to their period, with the children each flagged.
    """
    n, t = keep.shape
    columns = PARENT + ["period_start", "children"]
    cells = np.zeros((n, t), dtype=bool)
    if shortages is None or len(shortages) == 0:
        empty = {"product": pd.Series(dtype=object), "site": pd.Series(dtype=object)}
        return cells, pd.DataFrame(empty | {"period_start": pd.Series(dtype="datetime64[ns]"), "children": pd.Series(dtype=np.int64)})
    dates = pd.to_datetime(shortages["period_start"], errors="coerce")
    records = shortages.loc[dates.notna().to_numpy(), PARENT].astype(str).reset_index(drop=True)
    records["period_start"] = period_start(dates[dates.notna()].reset_index(drop=True), period)
    records = records.drop_duplicates().reset_index(drop=True)
    col = period_ordinal(records["period_start"], period) - first_ord
    parent_code, parents = factorize(leaves, PARENT) if n else (np.zeros(0, np.int64), pd.DataFrame(columns=PARENT))
    ppos = lookup(records, PARENT, parents) if n else np.full(len(records), -1)
    ok = (ppos >= 0) & (col >= 0) & (col < t)
    by_parent = np.zeros((len(parents), t), dtype=bool)
    by_parent[ppos[ok], col[ok]] = True
    cells = by_parent[parent_code] & keep
    li, pj = np.nonzero(cells)
    flagged_per_parent = np.bincount(parent_code[li] * t + pj, minlength=len(parents) * t)
    children = np.zeros(len(records), dtype=np.int64)
    children[ok] = flagged_per_parent[ppos[ok] * t + col[ok]]
    records["children"] = children
    return cells, records.sort_values(columns[:3], kind="stable").reset_index(drop=True)


def clean_history(
    raw: pd.DataFrame,
    products: pd.DataFrame,
    spans: pd.DataFrame,
    config: PlanningConfig,
    shortages: pd.DataFrame | None = None,
) -> CleaningResult:
    """Apply the rules of this module. Returns cleaned, rejected and corrections tables.

    `shortages` (optional): product, site, period_start (any day of the period).
    """
    period = config.calendar.period
    used, rejected, cycle_date = reject_lines(raw, products, spans, config)
    cycle_ord = int(period_ordinal(pd.DatetimeIndex([cycle_date]), period)[0])

    # --- bucket and net: one value per leaf and period
    leaf_code, leaves = factorize(used, LEAF)
    n_leaves = len(leaves)
    first_ord = int(used["ordinal"].min()) if len(used) else cycle_ord - 1
    t = cycle_ord - first_ord  # periods in the grid: first history period .. cycle - 1
    cell = leaf_code * t + (used["ordinal"].to_numpy() - first_ord)
    net = np.bincount(cell, weights=used["quantity"].to_numpy(), minlength=n_leaves * t).reshape(n_leaves, t)
    lines = np.bincount(cell, minlength=n_leaves * t).reshape(n_leaves, t)
    observed = lines > 0

    # --- each series' fill range, in grid columns
    from_ord, to_ord = span_bounds(spans, period)
    pos = lookup(leaves, LEAF, spans)
    span_from = from_ord[pos] - first_ord
    span_to = to_ord[pos] - first_ord
    first_line = np.argmax(observed, axis=1)
    start = np.where(np.isnan(span_from), first_line, np.clip(span_from, 0, None)).astype(np.int64)
    end = np.where(np.isnan(span_to), t - 1, np.clip(span_to, -1, t - 1)).astype(np.int64)
    cols = np.arange(t)
    in_range = (cols >= start[:, None]) & (cols <= end[:, None])
    keep = observed | in_range

    # --- returns: negative net periods to zero
    corrections = []
    raw_net = np.where(keep, net, np.nan)
    values = raw_net.copy()
    negative = observed & (net < 0)
    if negative.any():
        corrections.append(_correction_rows(negative, raw_net, np.zeros_like(raw_net), "negative_net_to_zero", {"rule": "net_then_zero"}))
        values[negative] = 0.0
    corrected = negative.copy()

    # --- shortage periods: flagged on every child of the product x site
    short, shortage_periods = _shortage_cells(shortages, leaves, keep, first_ord, period)

    # --- per product class: outliers on the non-shortage periods, then the shortage rule
    product_class = products.drop_duplicates("product").set_index("product")["product_class"]
    leaf_class = leaves["product"].map(product_class).to_numpy(dtype=object)
    m = season_length(period)
    fill = config.cleansing.shortages == "fill_baseline"
    summary = []
    for name in sorted(pd.unique(leaf_class)):  # a loop over product classes, not over series
        pc = config.product_class(name)
        rule = pc.outlier_rule(config.cleansing)
        rows = np.flatnonzero(leaf_class == name)
        x, skip = values[rows], short[rows]
        if rule.seasonal_adjust == "auto" and pc.models.seasonal and t > 0:
            s, adjusted, _ = seasonal_component(x, m, exclude=skip)
        else:
            s, adjusted = np.zeros_like(x), np.zeros(len(rows), dtype=bool)
        seasonal_figures = {"seasonal": np.where(adjusted[:, None], s, np.nan)}
        params = _rule_parameters(rule)
        summary.append(
            {"product_class": name, **{"rule": rule.rule, **params}, "series": len(rows), "seasonal_series": int(adjusted.sum())}
        )

        if rule.rule != "none" and t > 0:
            j = judge_outliers(np.where(skip, np.nan, x - s), rule, s)
            if j.flagged.any():
                after = np.where(j.flagged, j.replacement, x)
                corrections.append(
                    _correction_rows(j.flagged, x, after, f"{rule.rule}_cap", params, rows, j.figures | seasonal_figures, adjusted)
                )
                corrected[rows] |= j.flagged
                x = after

        if fill and skip.any():
            short_rows = np.flatnonzero(skip.any(axis=1))  # only the series a shortage touches
            base = np.full(x.shape, np.nan)
            count = np.zeros(x.shape)
            base[short_rows], count[short_rows] = rolling_median(np.where(skip, np.nan, x - s)[short_rows], rule.window)
            filled = skip & ~np.isnan(base)
            if filled.any():
                after = np.where(filled, np.clip(base + s, 0.0, None), x)
                fill_params = {"rule": "fill_baseline", "window": rule.window, "seasonal_adjust": rule.seasonal_adjust}
                figures = {"median": base, "periods": count} | seasonal_figures
                corrections.append(_correction_rows(filled, x, after, "shortage_fill", fill_params, rows, figures, adjusted))
                corrected[rows] |= filled
                x = after
        values[rows] = x

    # --- long tables
    li, pj = np.nonzero(keep)
    cleaned = leaves.iloc[li].reset_index(drop=True)
    cleaned["period_start"] = ordinal_to_start(pj + first_ord, period)
    cleaned["quantity"] = values[li, pj]
    cleaned["raw_quantity"] = net[li, pj]
    cleaned["lines"] = lines[li, pj].astype(np.int64)
    cleaned["filled"] = ~observed[li, pj]
    cleaned["corrected"] = corrected[li, pj]
    cleaned["shortage"] = short[li, pj]

    empty = np.zeros((0, 0))
    corr = pd.concat(corrections or [_correction_rows(empty.astype(bool), empty, empty, "hampel_cap", {})], ignore_index=True)
    corr = pd.concat([leaves.iloc[corr.pop("leaf").to_numpy()].reset_index(drop=True), corr], axis=1)
    corr.insert(3, "period_start", ordinal_to_start(corr.pop("col").to_numpy() + first_ord, period))
    # stable sort on the key only: the rules of one period stay in the order they ran
    corr = corr.sort_values(LEAF + ["period_start"], kind="stable").reset_index(drop=True)
    return CleaningResult(
        cleaned=cleaned,
        rejected=rejected,
        corrections=corr,
        cycle_date=cycle_date,
        outlier_rules=pd.DataFrame(summary),
        shortage_periods=shortage_periods,
    )


def _correction_rows(
    mask: np.ndarray,
    before: np.ndarray,
    after: np.ndarray,
    rule: str,
    params: dict,
    leaf_index: np.ndarray | None = None,
    figures: dict[str, np.ndarray] | None = None,
    adjusted: np.ndarray | None = None,
) -> pd.DataFrame:
    """One row per True cell of `mask`: before, after, delta and the parameters as JSON.

    `leaf_index` maps the rows of `mask` to leaf codes (default: the identity);
    `figures` are per-cell numbers added to each row's parameters (NaN left out);
    `adjusted` per row of `mask` says whether the series was seasonally adjusted.
    """
    i, j = np.nonzero(mask)
    b, a = before[i, j], after[i, j]
    if figures or adjusted is not None:
        picked = {k: v[i, j] for k, v in (figures or {}).items()}
        extra = [{k: round(float(v[r]), 6) for k, v in picked.items() if not np.isnan(v[r])} for r in range(len(i))]
        if adjusted is not None:
            for r, e in enumerate(extra):
                e["seasonal_adjusted"] = bool(adjusted[i[r]])
        parameters = [json.dumps(params | e) for e in extra]
    else:
        parameters = json.dumps(params)
    leaf = i if leaf_index is None else np.asarray(leaf_index)[i]
    return pd.DataFrame({"leaf": leaf, "col": j, "rule": rule, "before": b, "after": a, "delta": a - b, "parameters": parameters})


def find_unexplained_changes(cleaned: pd.DataFrame, corrections: pd.DataFrame, tolerance: float = 1e-6) -> pd.DataFrame:
    """Series whose cleaned total differs from raw total + audited corrections.

    Per series: sum(raw_quantity) + sum(delta) must equal sum(quantity).
    """
    totals = cleaned.groupby(LEAF, sort=True, observed=True)[["raw_quantity", "quantity"]].sum()
    moved = corrections.groupby(LEAF, sort=True, observed=True)["delta"].sum()
    totals["corrections"] = moved.reindex(totals.index).fillna(0.0)
    totals["unexplained"] = totals["quantity"] - totals["raw_quantity"] - totals["corrections"]
    return totals[totals["unexplained"].abs() > tolerance].reset_index()


def line_accounting(raw_lines: int, cleaned: pd.DataFrame, rejected: pd.DataFrame) -> dict[str, int]:
    """Raw lines against used (summed into cleaned periods) plus rejected lines."""
    used = int(cleaned["lines"].sum())
    return {"raw_lines": raw_lines, "used_lines": used, "rejected_lines": len(rejected), "unaccounted": raw_lines - used - len(rejected)}


def cycle_calendar(cleaned: pd.DataFrame, config: PlanningConfig, cycle_date: pd.Timestamp) -> pd.DataFrame:
    """One row describing the cycle: its date, period kind, horizon and history range."""

    period = config.calendar.period
    horizon = horizon_starts(cycle_date, config.calendar.horizon, period)
    start = cleaned["period_start"].min() if len(cleaned) else pd.NaT
    periods = (
        int(period_ordinal(pd.DatetimeIndex([cycle_date]), period)[0] - period_ordinal(pd.DatetimeIndex([start]), period)[0])
        if len(cleaned)
        else 0
    )
    return pd.DataFrame(
        {
            "cycle_date": [cycle_date],
            "period": [period],
            "horizon": [config.calendar.horizon],
            "horizon_end": [horizon[-1]],
            "history_start": [start],
            "history_periods": [periods],
        }
    )
