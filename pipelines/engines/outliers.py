"""Outlier rules over many series at once: rolling statistics, Hampel and Tukey limits, seasonal adjustment.

All statistics are over a centred window of `window` periods, truncated at the
ends of the grid and skipping periods without a value (NaN).

- `hampel` (Hampel 1974; scale 1.4826 x MAD as in Leys et al. 2013): a value
  with |x_t - m_t| > k * 1.4826 * MAD_t, where m_t is the window median.
  Where MAD_t = 0 nothing is flagged: an intermittent series whose window is
  mostly zeros has no spread to judge a spike by.
- `tukey` (Tukey 1977, fences): a value above Q3_t + c * IQR_t (or below
  Q1_t - c * IQR_t), c = `fence`, IQR_t = Q3_t - Q1_t. Quartiles by linear
  interpolation between order statistics: Hyndman & Fan (1996) type 7, the
  default of `numpy.percentile` and of pandas' `quantile`. Where IQR_t = 0
  nothing is flagged.
- the order statistics of a matrix of more windows than one chunk
  (`CHUNK_CELLS`) come from one compiled sweep per row (`rolling_order`),
  those of a smaller one from numpy's sort of its windows: the same numbers.
- `seasonal_component`: the seasonal component of a classical additive
  decomposition (statsmodels' `seasonal_decompose`; Kendall & Stuart,
  Makridakis et al. 1998, ch. 3), so a seasonal series is judged on x - s.

How the cleansing stage applies them is in `pipelines.stages.cleaned_history`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from pipelines.config_sections import OutlierConfig

MAD_SCALE = 1.4826  # 1 / Phi^-1(3/4): makes the MAD consistent for the normal sd (Leys et al. 2013)


CHUNK_CELLS = 4_000_000  # window cells per block of rows: bounds the memory of the rolling statistics
MEDIAN_MAD, QUARTILES, MEDIAN_COUNT = 0, 1, 2  # the statistics `rolling_order.rolling_stats` returns (its `kind`)


def _rolling(matrix: np.ndarray, window: int, stats, chunk_cells: int = CHUNK_CELLS) -> list[np.ndarray]:
    """Centred rolling statistics of each row of `matrix` (n_series, n_periods), NaN = no value.

    `stats(windows, n)` gets the windows of a block of rows, shape (rows,
    n_periods, window), NaN-padded at both ends, and the number of values in
    each window (int64, (rows, n_periods): a running count along the row, not a
    count over every window cell), and returns a tuple of (rows, n_periods)
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
        running = np.zeros((len(block), block.shape[1] + 1), dtype=np.int64)
        np.cumsum(~np.isnan(block), axis=1, out=running[:, 1:])
        result = stats(win, running[:, window:] - running[:, :-window])
        if out is None:
            out = [np.full((n, t), np.nan) for _ in result]
        for o, r in zip(out, result, strict=False):
            o[lo : lo + step] = r
    return out


def _sorted_quantile(s: np.ndarray, n: np.ndarray, p: float, base: np.ndarray | None = None) -> np.ndarray:
    """Quantile p of the first n values of each sorted window (NaN where n = 0).

    Linear interpolation between order statistics, Hyndman & Fan (1996) type 7:
    h = (n - 1) p, q = x[floor h] + (h - floor h) (x[floor h + 1] - x[floor h]);
    numpy.percentile's default method "linear". `base`: `_window_base(s)`, when the caller has it.
    """
    h = np.maximum(n - 1, 0) * p
    lo = np.floor(h).astype(np.int64)
    hi = np.minimum(lo + 1, np.maximum(n - 1, 0))
    base = _window_base(s) if base is None else base
    a, b = _at_rank(s, lo, base), _at_rank(s, hi, base)
    with np.errstate(invalid="ignore"):
        q = a + (h - lo) * (b - a)
    return np.where(n > 0, q, np.nan)


def _window_base(s: np.ndarray) -> np.ndarray:
    """The flat position of each window's first cell in `s` (sorted windows, contiguous), shaped as one rank."""
    width = s.shape[-1]
    return (np.arange(s.size // max(width, 1), dtype=np.int64) * width).reshape(s.shape[:-1])


def _at_rank(s: np.ndarray, rank: np.ndarray, base: np.ndarray | None = None) -> np.ndarray:
    """`s[..., rank]` per window: `np.take_along_axis(s, rank[..., None], -1)[..., 0]` as one flat gather
    (`s`: the sorted windows, contiguous as `np.sort` returns them; `base`: `_window_base(s)`)."""
    base = _window_base(s) if base is None else base
    return s.reshape(-1)[base + rank]


def _sorted_median(s: np.ndarray, n: np.ndarray, base: np.ndarray) -> np.ndarray:
    """Median of the first n values of each sorted window (NaN where n = 0): the mean of the values at ranks
    (n - 1) // 2 and n // 2 (one value twice where n is odd)."""
    lo = np.clip((n - 1) // 2, 0, None)
    hi = np.clip(n // 2, 0, None)
    med = _at_rank(s, lo, base)
    med += _at_rank(s, hi, base)
    med /= 2.0
    med[n == 0] = np.nan
    return med


def _rolling_nanmedian(windows: np.ndarray, n: np.ndarray | None = None) -> np.ndarray:
    """Median over the last axis ignoring NaN (NaN where a window is all NaN); `n`: the values per window.

    np.sort puts NaN last, so the valid values of each window are its first n.
    """
    s = np.sort(windows, axis=-1)
    n = np.sum(~np.isnan(windows), axis=-1) if n is None else n
    return _sorted_median(s, n, _window_base(s))


def _compiled(matrix: np.ndarray, window: int, chunk_cells: int) -> bool:
    """Whether the compiled sweep (`rolling_order`) takes `matrix`: when its windows exceed one numpy chunk.
    A smaller matrix is sorted by numpy (no compiled code loaded for it: a small class stays quick to start);
    both give the same numbers bit for bit (`tests/test_rolling_order.py`)."""
    return matrix.size * window > chunk_cells


def _sweep(matrix: np.ndarray, window: int, kind: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    from pipelines.engines.rolling_order import rolling  # numba loaded only for a matrix that needs it

    return rolling(matrix, window, kind)


def hampel(
    matrix: np.ndarray, window: int, k: float = 3.0, chunk_cells: int = CHUNK_CELLS
) -> tuple[np.ndarray, np.ndarray]:
    """Rolling centred median and MAD of each row of `matrix` (NaN = no value).

    matrix: (n_series, n_periods). Returns (median, mad), both that shape; the
    window is truncated at the edges (min one value). `k` is not used here (the
    limits are `hampel_limits`); it stays for callers that pass it.
    """
    if _compiled(matrix, window, chunk_cells):
        med, mad, _ = _sweep(matrix, window, MEDIAN_MAD)
        return med, mad

    def median_mad(win, n):
        s = np.sort(win, axis=-1)
        base = _window_base(s)
        med = _sorted_median(s, n, base)
        # the absolute deviations in place of the sorted values, then sorted in place; a window has as many
        # deviations as values (a window without values has a NaN median) unless its median is infinite
        np.subtract(win, med[..., None], out=s)
        np.abs(s, out=s)
        n_dev = np.sum(~np.isnan(s), axis=-1) if np.isinf(med).any() else n
        s.sort(axis=-1)
        return med, _sorted_median(s, n_dev, base)

    med, mad = _rolling(matrix, window, median_mad, chunk_cells)
    return med, mad


def tukey(matrix: np.ndarray, window: int, chunk_cells: int = CHUNK_CELLS) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Rolling centred first quartile, median and third quartile of each row (type 7).

    matrix: (n_series, n_periods), NaN = no value. Returns (q1, median, q3), each
    that shape; windows truncated at the edges like `hampel`.
    """
    if _compiled(matrix, window, chunk_cells):
        return _sweep(matrix, window, QUARTILES)

    def quartiles(win, n):
        s = np.sort(win, axis=-1)
        base = _window_base(s)
        return tuple(_sorted_quantile(s, n, p, base) for p in (0.25, 0.5, 0.75))

    q1, med, q3 = _rolling(matrix, window, quartiles, chunk_cells)
    return q1, med, q3


def rolling_median(matrix: np.ndarray, window: int, chunk_cells: int = CHUNK_CELLS) -> tuple[np.ndarray, np.ndarray]:
    """Rolling centred median of each row ignoring NaN, and the number of values it came from."""
    if _compiled(matrix, window, chunk_cells):
        med, count, _ = _sweep(matrix, window, MEDIAN_COUNT)
        return med, count

    def median_count(win, n):
        return _rolling_nanmedian(win, n), n.astype(float)

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
    values: np.ndarray,
    q1: np.ndarray,
    med: np.ndarray,
    q3: np.ndarray,
    rule: OutlierConfig,
    seasonal: np.ndarray | float = 0.0,
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
    (trend,) = _rolling(matrix, len(weights), lambda win, _: (win @ weights,), chunk_cells)
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
    index = np.where(
        adjusted[:, None], index - np.nanmean(np.where(adjusted[:, None], index, 0.0), axis=1, keepdims=True), 0.0
    )
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


class _AtCells:
    """A per-cell figure of a correction row computed at the cells asked for only (`figure[i, j]`), with the
    arithmetic its whole matrix would have had there."""

    def __init__(self, at):
        self._at = at

    def __getitem__(self, cells):
        return self._at(cells)


def judge_values(
    x: np.ndarray, skip: np.ndarray, rule: OutlierConfig, seasonal: np.ndarray | float = 0.0
) -> tuple[_Judged, np.ndarray]:
    """`judge_outliers(np.where(skip, np.nan, x - seasonal), rule, seasonal)` and the values after it (the
    replacement where flagged, else x). A matrix the compiled sweep takes (`_compiled`) is judged by
    `rolling_order.judge_rows` in one pass per row, without the judged matrix or the limits' temporaries;
    its figures are computed at the flagged cells only. Both give the same numbers bit for bit
    (`tests/test_rolling_order.py`)."""
    if rule.rule not in ("hampel", "tukey") or not _compiled(x, rule.window, CHUNK_CELLS):
        j = judge_outliers(np.where(skip, np.nan, x - seasonal), rule, seasonal)
        return j, np.where(j.flagged, j.replacement, x) if j.flagged.any() else x
    from pipelines.engines.rolling_order import judge_rows  # numba loaded only for a matrix that needs it

    hampel_rule = rule.rule == "hampel"
    s = np.ascontiguousarray(seasonal, dtype=np.float64) if np.ndim(seasonal) else np.zeros((0, 0))
    first, second, third, flagged, after = judge_rows(
        np.ascontiguousarray(x, dtype=np.float64),
        np.ascontiguousarray(skip, dtype=bool),
        s,
        int(rule.window),
        0 if hampel_rule else 1,
        rule.k * MAD_SCALE if hampel_rule else float(rule.fence),
        rule.sides == "both",
        rule.replace_with == "median",
    )
    if hampel_rule:
        figures = {"median": first, "limit_scale": _AtCells(lambda at: rule.k * MAD_SCALE * second[at])}
    else:
        figures = {
            "q1": first,
            "median": second,
            "q3": third,
            "lower": _AtCells(lambda at: tukey_fences(first[at], third[at], rule.fence)[0]),
            "upper": _AtCells(lambda at: tukey_fences(first[at], third[at], rule.fence)[1]),
        }
    return _Judged(flagged, after, figures), after


def rule_parameters(rule: OutlierConfig) -> dict:
    params = {"window": rule.window}
    if rule.rule == "hampel":
        params["k"] = rule.k
    elif rule.rule == "tukey":
        params["fence"] = rule.fence
    return params | {"replace_with": rule.replace_with, "sides": rule.sides, "seasonal_adjust": rule.seasonal_adjust}
