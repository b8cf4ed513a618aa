"""Croston's smoothed demand size and interval, in closed form over many series.

Croston (1972), as written in Hyndman & Athanasopoulos, FPP 3rd ed., section
13.2: with q_i the i-th non-zero demand and a_i the periods since the
previous one,
    q^_{i+1|i} = (1 - alpha_q) q^_{i|i-1} + alpha_q q_i,
    a^_{i+1|i} = (1 - alpha_a) a^_{i|i-1} + alpha_a a_i,
and the forecast is q^ / a^ (SBA, Syntetos & Boylan 2005, multiplies it by
1 - alpha_a / 2). Unrolled, the final state after n demands is
    q^ = (1 - alpha)^n q_0 + sum_i alpha (1 - alpha)^(n - i) q_i,
so every series is one weighted sum: a `bincount`, no loop over series or
periods. Without an initial value the first demand is the initial state (as
Croston did, and statsforecast's `CrostonClassic` does). The first interval is
counted from the start of the series, the first period being 1 (statsforecast's
convention).

The cycle runs the Croston models through statsforecast; this module gives
the final size and interval behind their forecasts, which the library does not
expose, for the `forecast_models` table.
"""

from __future__ import annotations

import numpy as np


def _smoothed(
    series: np.ndarray, value: np.ndarray, rank: np.ndarray, count: np.ndarray, n_series: int, alpha: float, initial
) -> np.ndarray:
    """Final SES state per series of the values `value` (rank = 1-based position among its series' values)."""
    n = count[series]
    decay = 1.0 - alpha
    if initial is None:
        # first value is the initial state: weight (1 - alpha)^(n - 1); later ones alpha (1 - alpha)^(n - i)
        weight = np.where(rank == 1, decay ** (n - 1), alpha * decay ** (n - rank))
        start = np.zeros(n_series)
    else:
        weight = alpha * decay ** (n - rank)
        start = np.broadcast_to(np.asarray(initial, dtype=float), (n_series,)) * decay**count
    out = start + np.bincount(series, weights=weight * value, minlength=n_series)
    return np.where(count > 0, out, np.nan)


def croston_states(
    y: np.ndarray,
    alpha_q: float = 0.1,
    alpha_a: float = 0.1,
    q0: float | np.ndarray | None = None,
    a0: float | np.ndarray | None = None,
    series: np.ndarray | None = None,
    n_series: int | None = None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(size, interval, forecast) per series after its last demand; NaN for a series without demand.

    y: either a dense (n_series, T) matrix, every row a series from its first
    period, or a long array with `series` codes (each series' rows
    consecutive, in time order) and `n_series`.
    """
    if series is None:
        y = np.atleast_2d(np.asarray(y, dtype=float))
        n_series, t = y.shape
        series = np.repeat(np.arange(n_series), t)
        y = y.ravel()
    y = np.asarray(y, dtype=float)
    position = np.arange(len(y)) - np.searchsorted(series, series, side="left")  # period index within its series
    nz = y > 0
    s, q, pos = series[nz], y[nz], position[nz]
    count = np.bincount(s, minlength=n_series)
    first = np.r_[True, s[1:] != s[:-1]] if len(s) else np.zeros(0, dtype=bool)
    rank = np.arange(len(s)) - np.searchsorted(s, s, side="left") + 1
    interval = np.where(first, pos + 1, np.diff(pos, prepend=0)).astype(float)
    size = _smoothed(s, q, rank, count, n_series, alpha_q, q0)
    gap = _smoothed(s, interval, rank, count, n_series, alpha_a, a0)
    with np.errstate(invalid="ignore", divide="ignore"):
        forecast = size / gap
    return size, gap, forecast
