"""The backtest's score book: running sums of every forecast's errors per product class, over origins.

One `ScoreBook` per backtest run. At each origin `add` takes a forecast block
(n_series, h) of one strategy (or share candidate) and grain, the actuals it is
scored against (`raw`: the history as recorded, returns netted; `cleaned`: the
cleaned history, the second column), each series' product class and its
in-sample scales, and accumulates per class:

- WMAPE = sum |e| / sum actual and bias = sum e / sum actual;
- MASE (Hyndman & Koehler 2006) = mean over scored cells of |e| / q, q the
  series' in-sample mean absolute (seasonal) naive difference;
- RMSSE (M5; `pipelines.engines.scaled_errors`): one value per series and
  origin, pooled per class weighted by the series' units over the last h
  in-sample periods (`volume_weights`);
- at leaf grain against raw actuals, the class's loss in each scored period
  (origin x step) for the Diebold-Mariano test of `strategy_choice`: the sum of
  |e| (the WMAPE numerator) and the volume-weighted sum of e^2 / q2 (the MSSE
  that RMSSE roots; `forecast_comparison.class_loss_differential`).

Errors are e = forecast - actual; every measure is lower-is-better except bias.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from pipelines.calendar import season_length
from pipelines.engines.accuracy import mase_scale
from pipelines.engines.forecast_comparison import squared_scaled_loss
from pipelines.engines.scaled_errors import rmsse, rmsse_scale, rmsse_sums, volume_weights
from pipelines.vocabulary import BENCHMARK

RAW, CLEANED = "raw", "cleaned"
LOSS_COLUMNS = ["product_class", "strategy", "origin", "step", "abs_loss", "squared_scaled_loss"]
_ABS, _ERR, _ACT, _SCALED, _CELLS = range(5)


@dataclass(frozen=True)
class Scales:
    """Per series (n,): MASE scale q, RMSSE scale q2 and RMSSE weight (recent in-sample units)."""

    q: np.ndarray
    q2: np.ndarray
    weight: np.ndarray


@dataclass
class ScoreBook:
    classes: list[str]
    n_origins: int
    h: int
    sums: dict = field(default_factory=dict)  # (name, grain, basis) -> (n_classes, 5)
    rmsse_rows: dict = field(default_factory=dict)  # (name, grain, basis) -> [(values, weights, class codes)]
    losses: dict = field(default_factory=dict)  # name -> (abs, squared scaled), each (n_classes, n_origins * h)

    def add(
        self, k: int, name: str, grain: str, fc: np.ndarray, actual: dict[str, np.ndarray], cls: np.ndarray,
        scales: Scales,
    ) -> None:
        """Score forecast `fc` (n, h) of `name` at origin number `k` against each basis of `actual` (raw, cleaned)."""
        n_classes = len(self.classes)
        q = scales.q[:, None]
        good = np.isfinite(q) & (q > 0)
        for basis, act in actual.items():
            e = fc - act
            scaled = np.divide(np.abs(e), q, out=np.zeros_like(e), where=good)
            per_series = np.stack(
                [np.abs(e).sum(1), e.sum(1), act.sum(1), scaled.sum(1), np.broadcast_to(good, e.shape).sum(1)], axis=1
            )
            book = self.sums.setdefault((name, grain, basis), np.zeros((n_classes, 5)))
            np.add.at(book, cls, per_series)
            self.rmsse_rows.setdefault((name, grain, basis), []).append((rmsse(act, fc, scales.q2), scales.weight, cls))
            if grain == "leaf" and basis == RAW:
                if name not in self.losses:
                    width = self.n_origins * self.h
                    self.losses[name] = (np.zeros((n_classes, width)), np.zeros((n_classes, width)))
                a, s = self.losses[name]
                cols = slice(k * self.h, (k + 1) * self.h)
                np.add.at(a[:, cols], cls, np.abs(e))
                np.add.at(s[:, cols], cls, squared_scaled_loss(act, fc, scales.q2) * scales.weight[:, None])

    def metrics(self, name: str, grain: str, basis: str = RAW) -> dict[str, np.ndarray]:
        """Per class (n_classes,): wmape, bias, mase, rmsse of `name` at `grain` against `basis` (NaN: unscored)."""
        return {m: ratio(num, den) for m, (num, den) in self.parts(name, grain, basis).items()}

    def parts(self, name: str, grain: str, basis: str = RAW) -> dict[str, tuple[np.ndarray, np.ndarray]]:
        """Per metric, the (numerator, denominator) per class (n_classes,) whose ratio it is: sums over series,
        periods and origins, so the parts of disjoint sets of series (shards) add up to those of their union
        (`pipelines.engines.backtest_combine`). wmape |e| / actual, bias e / actual, mase scaled |e| / cells,
        rmsse the volume-weighted sum of per-series RMSSE / the weights."""
        n_classes = len(self.classes)
        m = self.sums.get((name, grain, basis), np.zeros((n_classes, 5)))
        out = {
            "wmape": (m[:, _ABS], m[:, _ACT]), "bias": (m[:, _ERR], m[:, _ACT]), "mase": (m[:, _SCALED], m[:, _CELLS]),
        }
        rows = self.rmsse_rows.get((name, grain, basis), [])
        if rows:
            values, weights, cls = (np.concatenate(parts) for parts in zip(*rows, strict=True))
            out["rmsse"] = rmsse_sums(values, weights, cls, n_classes)
        else:
            out["rmsse"] = (np.zeros(n_classes), np.zeros(n_classes))
        return out

    def loss_table(self, origins: list[pd.Timestamp]) -> pd.DataFrame:
        """Leaf-grain class losses per scored period (origin x step) of every strategy scored: LOSS_COLUMNS."""
        frames = []
        steps = np.tile(np.arange(1, self.h + 1), self.n_origins)
        when = np.repeat(np.asarray(origins, dtype="datetime64[ns]"), self.h)
        for name, (a, s) in self.losses.items():
            for i, cls in enumerate(self.classes):
                frames.append(pd.DataFrame({
                    "product_class": cls, "strategy": name, "origin": when, "step": steps,
                    "abs_loss": a[i], "squared_scaled_loss": s[i],
                }))
        if not frames:
            return pd.DataFrame({c: pd.Series(dtype=object) for c in LOSS_COLUMNS})
        return pd.concat(frames, ignore_index=True)[LOSS_COLUMNS]


def ratio(numerator: np.ndarray, denominator: np.ndarray) -> np.ndarray:
    """numerator / denominator where the denominator is positive, else NaN (no volume, no scored cell)."""
    num, den = np.asarray(numerator, dtype=float), np.asarray(denominator, dtype=float)
    return np.divide(num, den, out=np.full(num.shape, np.nan), where=den > 0)


def dense_window(code: np.ndarray, ords: np.ndarray, qty: np.ndarray, n: int, start: int, width: int) -> np.ndarray:
    """(n, width) sums of qty per series for periods start..start+width-1."""
    inside = (ords >= start) & (ords < start + width)
    flat = np.bincount(code[inside] * width + (ords[inside] - start), weights=qty[inside], minlength=n * width)
    return flat.reshape(n, width)


def error_scales(grid, cls: np.ndarray, seasonal_classes, period: str, h: int) -> Scales:
    """MASE and RMSSE scales per series (seasonal differences for seasonal classes) and RMSSE's volume weights."""
    sl = season_length(period)
    seasonal = np.isin(cls, list(seasonal_classes))
    q = mase_scale(grid.series, grid.y, grid.n_series, 1)
    q2 = rmsse_scale(grid.series, grid.y, grid.n_series, 1)
    if seasonal.any():
        qs = mase_scale(grid.series, grid.y, grid.n_series, sl)
        q2s = rmsse_scale(grid.series, grid.y, grid.n_series, sl)
        q, q2 = np.where(seasonal & np.isfinite(qs), qs, q), np.where(seasonal & np.isfinite(q2s), q2s, q2)
    return Scales(q=q, q2=q2, weight=volume_weights(grid.series, grid.y, grid.n_series, h))


# the accuracy table's columns before the backtest adds the seasonality it ran with and the selection counts
TABLE_COLUMNS = [
    "product_class", "strategy", "grain", "metric", "value", "origins", "horizon", "series", "value_cleaned",
    "selection_metric",
]
# the sums each value is the ratio of (fva: NaN, a difference of two WMAPEs), additive over shards
PART_COLUMNS = ["numerator", "denominator", "numerator_cleaned", "denominator_cleaned"]


def accuracy_table(book: ScoreBook, names, metric: np.ndarray, c_cls, p_cls, n_origins: int, h: int) -> pd.DataFrame:
    """TABLE_COLUMNS + PART_COLUMNS: a row per class with series, strategy of `names`, grain and metric."""
    classes = book.classes
    counts = {"leaf": np.bincount(c_cls, minlength=len(classes)), "parent": np.bincount(p_cls, minlength=len(classes))}
    nothing = np.full(len(classes), np.nan)
    out = []
    for grain in ("leaf", "parent"):
        bench = {b: book.metrics(BENCHMARK, grain, b) for b in (RAW, CLEANED)}
        for s in names:
            parts = {b: {**book.parts(s, grain, b), "fva": (nothing, nothing)} for b in (RAW, CLEANED)}
            values = {b: book.metrics(s, grain, b) for b in (RAW, CLEANED)}
            for b in (RAW, CLEANED):
                values[b]["fva"] = bench[b]["wmape"] - values[b]["wmape"]
            for name_metric in ("wmape", "bias", "mase", "rmsse", "fva"):
                (num, den), (num_c, den_c) = parts[RAW][name_metric], parts[CLEANED][name_metric]
                for i, name in enumerate(classes):
                    out.append((
                        name, s, grain, name_metric, float(values[RAW][name_metric][i]), n_origins, h,
                        int(counts[grain][i]), float(values[CLEANED][name_metric][i]), metric[i],
                        float(num[i]), float(den[i]), float(num_c[i]), float(den_c[i]),
                    ))
    table = pd.DataFrame(out, columns=TABLE_COLUMNS + PART_COLUMNS)
    keep = table["series"] > 0  # a class without series in the data has nothing to report
    return table[keep].reset_index(drop=True)
