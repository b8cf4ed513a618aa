"""Accuracy measures of point forecasts, vectorised over many series.

Errors are e = forecast - actual (a positive bias is an over-forecast).

- WMAPE = sum |e| / sum actual (weighted MAPE; undefined without volume).
- bias = sum e / sum actual.
- MAE, RMSE, MAPE = 100 x mean |e / actual| (Hyndman & Athanasopoulos, FPP 3rd
  ed., section 5.8).
- MASE (Hyndman & Koehler 2006): mean |e| / q, with q the in-sample mean
  absolute m-step naive difference of the training data, mean_t |y_t - y_{t-m}|
  (m = 1 non-seasonal, m = season length for seasonal data). A series with
  q = 0 (constant, or shorter than m + 1 periods) has no MASE and is left out
  of pooled MASE.
- Forecast value added (common practice, no single source; the term is from
  Gilliland's work on the forecasting process): WMAPE of the seasonal naive
  benchmark minus WMAPE of the forecast, in WMAPE points; positive = better
  than the benchmark.
"""

from __future__ import annotations

import numpy as np


def mase_scale(series: np.ndarray, y: np.ndarray, n_series: int, m: int) -> np.ndarray:
    """Per series: mean |y_t - y_{t-m}| over its training rows (NaN when fewer than m + 1 rows).

    series, y: aligned long arrays, each series' rows consecutive and in time order.
    """
    same = np.zeros(len(y), dtype=bool)
    same[m:] = series[m:] == series[:-m]
    diff = np.zeros(len(y))
    diff[m:] = np.abs(y[m:] - y[:-m])
    count = np.bincount(series[same], minlength=n_series)
    total = np.bincount(series[same], weights=diff[same], minlength=n_series)
    return np.divide(total, count, out=np.full(n_series, np.nan), where=count > 0)


def point_accuracy(
    actual: np.ndarray, forecast: np.ndarray, scale: np.ndarray | float | None = None
) -> dict[str, float]:
    """RMSE, MAE, MAPE, MASE, WMAPE and bias of forecasts against actuals (any matching shapes).

    `scale` broadcasts against the arrays (one value per series row); cells
    whose scale is not a positive number are left out of MASE.
    """
    actual = np.asarray(actual, dtype=float)
    forecast = np.asarray(forecast, dtype=float)
    e = forecast - actual
    total = actual.sum()
    nonzero = actual != 0
    out = {
        "rmse": float(np.sqrt(np.mean(e**2))),
        "mae": float(np.mean(np.abs(e))),
        "mape": float(100 * np.mean(np.abs(e[nonzero] / actual[nonzero]))) if nonzero.any() else np.nan,
        "wmape": float(np.abs(e).sum() / total) if total > 0 else np.nan,
        "bias": float(e.sum() / total) if total > 0 else np.nan,
        "mase": np.nan,
    }
    if scale is not None:
        q = np.broadcast_to(np.asarray(scale, dtype=float), e.shape)
        ok = np.isfinite(q) & (q > 0)
        if ok.any():
            out["mase"] = float(np.mean(np.abs(e[ok]) / q[ok]))
    return out
