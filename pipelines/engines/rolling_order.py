"""Exact order statistics over centred rolling windows, one compiled pass per row (numba).

Each row of a (n_series, n_periods) matrix is swept once: the window's values
(NaN = no value, skipped) are kept sorted in a small buffer, one value inserted
and one removed per step (insertion by binary search, O(window) moves), so a
median or quartile is read at its rank, never estimated. The window of period
j holds the columns j - half .. j - half + window - 1 that exist (truncated at
the ends), half = window // 2, as `outliers._rolling` pads them.

The arithmetic on the order statistics is that of `outliers` written in numpy:
the median of n values is (x[(n-1)//2] + x[n//2]) / 2, a quantile p is
Hyndman & Fan (1996) type 7, x[lo] + (h - lo)(x[lo+1] - x[lo]) with
h = (n - 1) p, and the MAD is the median of |x - median| over the same values,
whose sorted order is merged from the sorted window outward from the median
(x - m is monotone in x, so the deviations left and right of the median are
each already in order). The same values at the same ranks give the same
float64 numbers bit for bit.
"""

from __future__ import annotations

import numpy as np
from numba import njit


@njit(cache=True)
def _insert(buf, n, v):
    """Insert v into the sorted first n cells of buf (n + 1 cells afterwards)."""
    lo, hi = 0, n
    while lo < hi:  # first cell greater than v: equal values keep their arrival order
        mid = (lo + hi) // 2
        if buf[mid] <= v:
            lo = mid + 1
        else:
            hi = mid
    i = n
    while i > lo:
        buf[i] = buf[i - 1]
        i -= 1
    buf[lo] = v


@njit(cache=True)
def _remove(buf, n, v):
    """Remove one cell equal to v from the sorted first n cells of buf (v is among them)."""
    lo, hi = 0, n
    while lo < hi:  # first cell not less than v
        mid = (lo + hi) // 2
        if buf[mid] < v:
            lo = mid + 1
        else:
            hi = mid
    for i in range(lo, n - 1):
        buf[i] = buf[i + 1]


@njit(cache=True)
def _replace(buf, n, out, v):
    """Put v in place of one cell equal to `out` in the sorted first n cells of buf, keeping them sorted
    (moves only the cells ranked between the two values)."""
    lo, hi = 0, n
    while lo < hi:  # first cell not less than `out`
        mid = (lo + hi) // 2
        if buf[mid] < out:
            lo = mid + 1
        else:
            hi = mid
    i = lo
    while i + 1 < n and buf[i + 1] < v:
        buf[i] = buf[i + 1]
        i += 1
    while i > 0 and buf[i - 1] > v:
        buf[i] = buf[i - 1]
        i -= 1
    buf[i] = v


@njit(cache=True)
def _median(buf, n):
    if n == 0:
        return np.nan
    m = buf[(n - 1) // 2]
    m += buf[n // 2]
    return m / 2.0


@njit(cache=True)
def _quantile(buf, n, p):
    if n == 0:
        return np.nan
    h = (n - 1) * p
    lo = int(np.floor(h))
    hi = min(lo + 1, n - 1)
    a = buf[lo]
    b = buf[hi]
    return a + (h - lo) * (b - a)


@njit(cache=True)
def _mad(buf, n, med, dev):
    """Median of |x - med| over the sorted first n cells of buf; `dev` a scratch buffer as long."""
    if n == 0:
        return np.nan
    if not np.isfinite(med):  # infinite median: deviations may be NaN (inf - inf), which are left out
        k = 0
        for i in range(n):
            d = abs(buf[i] - med)
            if not np.isnan(d):
                _insert(dev, k, d)
                k += 1
        return _median(dev, k)
    right, hi = 0, n  # first value with x - med >= 0 (x - med is monotone in x)
    while right < hi:
        mid = (right + hi) // 2
        if buf[mid] - med < 0:
            right = mid + 1
        else:
            hi = mid
    left = right - 1
    for k in range(n // 2 + 1):  # the merged deviations up to rank n // 2 are enough
        dl = abs(buf[left] - med) if left >= 0 else np.inf
        dr = abs(buf[right] - med) if right < n else np.inf
        take_left = dl <= dr
        dev[k] = dl if take_left else dr
        left -= take_left
        right += 1 - take_left
    return _median(dev, n)


@njit(cache=True)
def _open(row, window, buf):
    """The sorted buffer before period 0's step: the values of period 0's window but its last; returns n."""
    n = 0
    for c in range(min(len(row), window - 1 - window // 2)):
        v = row[c]
        if not np.isnan(v):
            _insert(buf, n, v)
            n += 1
    return n


@njit(cache=True)
def _step(row, window, buf, n, j):
    """The sorted buffer moved to period j's window (one value in, one out); returns its new n."""
    t = len(row)
    half = window // 2
    incoming = j - half + window - 1
    v = row[incoming] if incoming < t else np.nan
    outgoing = j - half - 1
    u = row[outgoing] if outgoing >= 0 else np.nan
    if np.isnan(u):
        if not np.isnan(v):
            _insert(buf, n, v)
            n += 1
    elif np.isnan(v):
        _remove(buf, n, u)
        n -= 1
    else:
        _replace(buf, n, u, v)
    return n


@njit(cache=True)
def _sweep_row(row, window, kind, buf, dev, first, second, third):
    """One row of `rolling_stats`: its statistics written into the rows `first`, `second`, `third`."""
    n = _open(row, window, buf)
    for j in range(len(row)):
        n = _step(row, window, buf, n, j)
        if kind == 0:
            med = _median(buf, n)
            first[j] = med
            second[j] = _mad(buf, n, med, dev)
            third[j] = n
        elif kind == 1:
            first[j] = _quantile(buf, n, 0.25)
            second[j] = _quantile(buf, n, 0.5)
            third[j] = _quantile(buf, n, 0.75)
        else:
            first[j] = _median(buf, n)
            second[j] = n
            third[j] = n


@njit(cache=True)
def _sweep_hampel(row, window, both, buf, dev, first, second):
    """`_sweep_row` of kind 0 for judging a Hampel rule with a scale >= 0: the median of every window into
    `first`, the MAD into `second` only where the row's own value can be flagged - a value v with v - median
    (|v - median| with `both`) above 0; elsewhere `second` is NaN. With scale * MAD >= 0 (or NaN), a
    deviation of 0 or less (or NaN) never exceeds it, so `judge_cell` flags the same cells with the same
    figures: the MAD of a flagged cell is the one `_sweep_row` gives."""
    n = _open(row, window, buf)
    for j in range(len(row)):
        n = _step(row, window, buf, n, j)
        med = _median(buf, n)
        first[j] = med
        deviation = row[j] - med
        if both:
            deviation = abs(deviation)
        second[j] = _mad(buf, n, med, dev) if deviation > 0 else np.nan


@njit(cache=True)
def rolling_stats(matrix, window, kind):
    """Per row and period of `matrix` (float64, C order), over the centred window:

    kind 0: (median, MAD, count); kind 1: (Q1, median, Q3) type 7; kind 2: (median, count, count) -
    the count as float64, the number of values in the window. NaN where a window has no value.
    """
    n_rows, t = matrix.shape
    first = np.empty((n_rows, t))
    second = np.empty((n_rows, t))
    third = np.empty((n_rows, t))
    buf = np.empty(window)
    dev = np.empty(window)
    for r in range(n_rows):
        _sweep_row(matrix[r], window, kind, buf, dev, first[r], second[r], third[r])
    return first, second, third


@njit(cache=True)
def _clipped(v):
    """`np.clip(v, 0.0, None)` of one float64: NaN stays NaN, -0.0 becomes 0.0."""
    return v if (v > 0.0 or np.isnan(v)) else 0.0


@njit(cache=True)
def judge_rows(x, skip, seasonal, window, kind, scale, both, to_median):
    """An outlier rule on every row of `x` in one pass per row, its statistics swept as `rolling_stats` does.

    Each row is judged on x - s (s: the row of `seasonal`, or 0.0 where `seasonal` has no rows), NaN where
    `skip`. kind 0, Hampel (`scale` = k * 1.4826): flagged where MAD > 0 and x - s - median (its absolute
    value with `both`) exceeds scale * MAD, replaced by median +- scale * MAD (`to_median`: the median);
    kind 1, Tukey (`scale` = the fence c): flagged where IQR > 0 and x - s > Q3 + c IQR (or, with `both`,
    < Q1 - c IQR), replaced by the fence crossed (or the median). The replacement gets s back, never
    below zero - the arithmetic of `outliers.hampel_limits` and `outliers.tukey_limits` cell by cell.

    Returns (first, second, third, flagged, after): kind 0 median, MAD and no third; kind 1 Q1, median, Q3;
    flagged (bool) and the values after (the replacement where flagged, else x).
    """
    n_rows, t = x.shape
    adjust = seasonal.shape[0] > 0
    first = np.empty((n_rows, t))
    second = np.empty((n_rows, t))
    third = np.empty((n_rows, t)) if kind == 1 else np.empty((n_rows, 0))
    spare = np.empty(t)
    flagged = np.zeros((n_rows, t), dtype=np.bool_)
    after = np.empty((n_rows, t))
    judged = np.empty(t)
    buf = np.empty(window)
    dev = np.empty(window)
    for r in range(n_rows):
        for c in range(t):
            s = seasonal[r, c] if adjust else 0.0
            judged[c] = np.nan if skip[r, c] else x[r, c] - s
        _sweep_row(judged, window, kind, buf, dev, first[r], second[r], third[r] if kind == 1 else spare)
        for c in range(t):
            v = judged[c]
            after[r, c] = x[r, c]
            if np.isnan(v):
                continue
            s = seasonal[r, c] if adjust else 0.0
            hit, value = judge_cell(v, s, kind, scale, both, to_median, first[r, c], second[r, c],
                                    third[r, c] if kind == 1 else 0.0)
            if hit:
                flagged[r, c] = True
                after[r, c] = value
    return first, second, third, flagged, after


@njit(cache=True)
def judge_cell(v, s, kind, scale, both, to_median, first, second, third):
    """One cell of `judge_rows`: the value v = x - s judged against its window's statistics (kind 0, Hampel:
    first = median, second = MAD; kind 1, Tukey: Q1, median, Q3). Returns (flagged, the replacement with s
    added back, never below zero; 0.0 where not flagged)."""
    if kind == 0:
        spread = scale * second
        deviation = v - first if not both else abs(v - first)
        if second > 0 and deviation > spread:
            if to_median:
                return True, _clipped(first + s)
            return True, _clipped((first + spread if v > first else first - spread) + s)
        return False, 0.0
    iqr = third - first
    lower = first - scale * iqr
    upper = third + scale * iqr
    high = v > upper
    if third - first > 0 and (high or (both and v < lower)):
        if to_median:
            return True, _clipped(second + s)
        return True, _clipped((upper if high else lower) + s)
    return False, 0.0


def rolling(matrix: np.ndarray, window: int, kind: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """`rolling_stats` on any 2-d float array (made float64, C order)."""
    matrix = np.ascontiguousarray(matrix, dtype=np.float64)
    if matrix.shape[1] == 0 or matrix.shape[0] == 0:
        empty = np.full(matrix.shape, np.nan)
        return empty, empty.copy(), empty.copy()
    return rolling_stats(matrix, int(window), int(kind))
