"""Is a challenger really better? The Diebold-Mariano test and the rule that keeps the incumbent.

**The test** (Diebold & Mariano 1995, "Comparing predictive accuracy", Journal
of Business & Economic Statistics 13(3)), with the small-sample correction of
Harvey, Leybourne & Newbold (1997, "Testing the equality of prediction mean
squared errors", International Journal of Forecasting 13(2)). For a loss
differential d_t = L(incumbent)_t - L(challenger)_t, t = 1..n, of h-step
forecasts:

    dbar     = (1/n) sum_t d_t
    gamma_k  = (1/n) sum_{t=k+1}^{n} (d_t - dbar)(d_{t-k} - dbar),   k = 0..h-1
    V        = (gamma_0 + 2 sum_{k=1}^{h-1} gamma_k) / n
    DM       = dbar / sqrt(V)
    DM_HLN   = DM * sqrt((n + 1 - 2h + h(h - 1)/n) / n),  compared with Student's t, n - 1 d.f.

h-step forecast errors are at most MA(h - 1), so autocovariances up to lag
h - 1 enter V (the "acf" estimator). That sum can be negative; then the
Bartlett weights 1 - k/h are used instead (Newey & West 1987), which is never
negative, and `estimator` says so. A differential that is constant has V = 0:
all zero is no difference (statistic 0, p-value 1); a non-zero constant is a
certain difference (statistic +-inf, p-value 0).

Many tests run at once: `d` is (k, n), one test per row (a class and a
challenger). Positive dbar means the challenger has the smaller loss.

**Pooling over the series of a class** (`class_loss_differential`): the
backtest has, per series, a loss in every scored period (origin x step). The
test is run on the per-period class loss: L_t = sum over the class's series of
the loss in period t, for each strategy. With the absolute error as loss,
L_t / (class actuals) is the class's WMAPE contribution of period t, so the
test compares the WMAPE the choice is made on; with the squared scaled error
e^2 / q2_i (weighted by volume) it compares the class's MSSE, the square of
what RMSSE averages (the test needs a loss that is a mean over periods, which
the square root of RMSSE is not). The periods are ordered origin by origin,
step by step; pass h = the backtest horizon, since the steps of one origin's
path share its errors.

**The decision** (`stable_choice`): keep the incumbent (the previous cycle's
choice) unless the best challenger beats it by more than a relative
`tolerance`, or by the one-sided test at `level`; `switch_on` says which
(either, both, tolerance only, test only). The tolerance rule is common
practice (a hysteresis band, no single source); the test is the published part.
Every decision is returned as data with its reason code and a sentence.
"""

from __future__ import annotations

from dataclasses import dataclass
from enum import StrEnum
from typing import Literal

import numpy as np
import pandas as pd
from scipy import stats


@dataclass(frozen=True)
class DMResult:
    """Per test (k,): statistic (HLN-corrected), p-value, n, mean differential, its variance V, the estimator used."""

    statistic: np.ndarray
    p_value: np.ndarray
    n: np.ndarray
    mean: np.ndarray
    variance: np.ndarray
    estimator: np.ndarray


def _autocovariances(centred: np.ndarray, h: int) -> np.ndarray:
    """(k, h) gamma_0..gamma_{h-1} of each row of `centred` (k, n), divided by n."""
    n = centred.shape[1]
    out = np.empty((centred.shape[0], h))
    for lag in range(h):  # a loop over lags (h at most the horizon), not over series
        out[:, lag] = (centred[:, lag:] * centred[:, : n - lag]).sum(axis=1) / n
    return out


def dm_test(
    d: np.ndarray,
    h: int = 1,
    alternative: Literal["two-sided", "greater", "less"] = "two-sided",
    harvey_correction: bool = True,
) -> DMResult:
    """Diebold-Mariano test of equal accuracy, HLN-corrected, on each row of `d`.

    d: (n,) or (k, n) loss differentials L(incumbent) - L(challenger), finite.
    h: forecast horizon (autocovariances up to lag h - 1), 1 <= h < n.
    alternative: "greater" tests mean d > 0 (the challenger is better), "less"
    mean d < 0, "two-sided" either. p-values from Student's t with n - 1 d.f.
    """
    d = np.atleast_2d(np.asarray(d, dtype=float))
    k, n = d.shape
    if alternative not in ("two-sided", "greater", "less"):
        raise ValueError(f"dm_test: unknown alternative {alternative!r}; choose from ['two-sided', 'greater', 'less']")
    if not 1 <= h < n:
        raise ValueError(f"dm_test: the horizon h must be at least 1 and below the number of periods ({n}), got {h}")
    bad = ~np.isfinite(d).all(axis=1)
    if bad.any():
        raise ValueError(
            f"dm_test: rows {np.flatnonzero(bad)[:10].tolist()} hold NaN or infinite loss differentials; "
            "give every test a complete series of periods (drop the periods one strategy did not score)"
        )
    mean = d.mean(axis=1)
    gamma = _autocovariances(d - mean[:, None], h)
    v_acf = (gamma[:, 0] + 2 * gamma[:, 1:].sum(axis=1)) / n
    bartlett = 1 - np.arange(1, h) / h
    v_bartlett = (gamma[:, 0] + 2 * (gamma[:, 1:] * bartlett).sum(axis=1)) / n
    use_acf = v_acf > 0
    variance = np.where(use_acf, v_acf, v_bartlett)
    estimator = np.where(use_acf | (v_bartlett <= 0), "acf", "bartlett").astype(object)
    degenerate = ~(variance > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        stat = mean / np.sqrt(variance)
        stat = np.where(degenerate, np.where(mean == 0, 0.0, np.copysign(np.inf, mean)), stat)
    if harvey_correction:
        stat = stat * np.sqrt((n + 1 - 2 * h + h * (h - 1) / n) / n)
    df = n - 1
    if alternative == "greater":
        p = stats.t.sf(stat, df)
    elif alternative == "less":
        p = stats.t.cdf(stat, df)
    else:
        p = 2 * stats.t.sf(np.abs(stat), df)
    p = np.where(degenerate & (mean == 0), 1.0, p)
    return DMResult(
        statistic=stat,
        p_value=np.asarray(p, dtype=float),
        n=np.full(k, n),
        mean=mean,
        variance=variance,
        estimator=estimator,
    )


def absolute_loss(actual: np.ndarray, forecast: np.ndarray) -> np.ndarray:
    """|f - y| per cell, any shape (the WMAPE numerator)."""
    return np.abs(np.asarray(forecast, dtype=float) - np.asarray(actual, dtype=float))


def squared_scaled_loss(actual: np.ndarray, forecast: np.ndarray, scale2: np.ndarray) -> np.ndarray:
    """(f - y)^2 / q2 per cell; actual, forecast (n, T), scale2 (n,) from `rmsse_scale`; 0 where q2 is not positive.

    A series without a usable scale has no RMSSE and is left out of its
    pooled value; its zero loss here leaves it out of the test the same way.
    """
    q2 = np.asarray(scale2, dtype=float)[:, None]
    e2 = (np.asarray(forecast, dtype=float) - np.asarray(actual, dtype=float)) ** 2
    return np.divide(e2, q2, out=np.zeros_like(e2), where=np.isfinite(q2) & (q2 > 0))


def class_loss_differential(
    loss_incumbent: np.ndarray,
    loss_challenger: np.ndarray,
    class_code: np.ndarray,
    n_classes: int,
    weight: np.ndarray | None = None,
) -> np.ndarray:
    """(n_classes, T) per-period class loss of the incumbent minus the challenger's.

    loss_*: (n_series, T) per-series, per-period losses (NaN = not scored, counted as 0
    for both, so both strategies are judged on the same cells); class_code:
    (n_series,) codes 0..n_classes-1; weight: optional (n_series,) weight of
    each series (e.g. its volume, for a volume-weighted MSSE).
    """
    a = np.asarray(loss_incumbent, dtype=float)
    b = np.asarray(loss_challenger, dtype=float)
    if a.shape != b.shape:
        raise ValueError(f"class_loss_differential: the two loss blocks differ in shape, {a.shape} vs {b.shape}")
    scored = np.isfinite(a) & np.isfinite(b)
    diff = np.where(scored, a - b, 0.0)
    if weight is not None:
        diff = diff * np.asarray(weight, dtype=float)[:, None]
    out = np.zeros((n_classes, a.shape[1]))
    np.add.at(out, np.asarray(class_code, dtype=np.int64), diff)
    return out


class Reason(StrEnum):
    """Why `stable_choice` kept or switched (stored beside the decision)."""

    NO_INCUMBENT = "no_incumbent"  # first cycle, or no previous choice stored: take the best
    INCUMBENT_NOT_CANDIDATE = "incumbent_not_a_candidate"  # the previous choice is no longer offered
    INCUMBENT_NOT_SCORED = "incumbent_not_scored"  # the previous choice has no score this cycle
    INCUMBENT_IS_BEST = "incumbent_is_best"
    CHALLENGER_NOT_BETTER = "challenger_not_better"  # the best challenger does not score lower (or has no score)
    WITHIN_TOLERANCE = "within_tolerance_not_significant"  # challenger better, but not by enough
    GAIN_ABOVE_TOLERANCE = "gain_above_tolerance"
    SIGNIFICANT = "significant_by_test"
    GAIN_AND_SIGNIFICANT = "gain_above_tolerance_and_significant"


@dataclass(frozen=True)
class StabilityRule:
    """When a challenger replaces the incumbent.

    tolerance: relative gain needed, (incumbent - challenger) / incumbent on a
    lower-is-better score (0.01 = 1 %); level: significance level of the
    one-sided DM-HLN test; switch_on: "either" (gain above tolerance or
    significant), "both", "tolerance" or "test".
    """

    tolerance: float = 0.01
    level: float = 0.05
    switch_on: Literal["either", "both", "tolerance", "test"] = "either"

    def __post_init__(self) -> None:
        if not (0 <= self.tolerance < 1):
            raise ValueError(f"StabilityRule.tolerance must be in [0, 1), got {self.tolerance}")
        if not (0 < self.level < 1):
            raise ValueError(f"StabilityRule.level must be in (0, 1), got {self.level}")
        if self.switch_on not in ("either", "both", "tolerance", "test"):
            raise ValueError(
                f"StabilityRule.switch_on: unknown {self.switch_on!r}; "
                "choose from ['either', 'both', 'tolerance', 'test']"
            )


DECISION_COLUMNS = [
    "incumbent",
    "challenger",
    "chosen",
    "decision",
    "reason",
    "incumbent_score",
    "challenger_score",
    "relative_gain",
    "p_value",
    "tolerance",
    "level",
    "detail",
]


def stable_choice(
    incumbent: np.ndarray,
    challenger: np.ndarray,
    incumbent_score: np.ndarray,
    challenger_score: np.ndarray,
    p_value: np.ndarray,
    rule: StabilityRule = StabilityRule(),
    candidates: np.ndarray | None = None,
) -> pd.DataFrame:
    """One row per class (k,): keep the incumbent or switch to the challenger, with the reason.

    incumbent: (k,) previous choice ("" or None where there is none);
    challenger: (k,) this cycle's best candidate by score; *_score: (k,)
    lower-is-better scores of both (NaN = not scored); p_value: (k,) one-sided
    DM-HLN p-value that the challenger is better (NaN = not tested);
    candidates: optional (k,) bool, whether the incumbent is still offered.
    Zero denominator: an incumbent scoring 0 has no relative gain to lose
    (gain 0). Columns: DECISION_COLUMNS; `decision` is keep, switch or first.
    """
    inc = np.array([x if isinstance(x, str) else "" for x in np.asarray(incumbent, dtype=object)], dtype=object)
    chal = np.asarray(challenger, dtype=object)
    a = np.asarray(incumbent_score, dtype=float)
    b = np.asarray(challenger_score, dtype=float)
    p = np.asarray(p_value, dtype=float)
    offered = np.ones(len(inc), dtype=bool) if candidates is None else np.asarray(candidates, dtype=bool)
    gain = np.divide(a - b, a, out=np.zeros(len(a)), where=a > 0)
    gain = np.where(np.isfinite(a) & np.isfinite(b), gain, np.nan)
    big = gain > rule.tolerance
    significant = p < rule.level
    by_rule = {"either": big | significant, "both": big & significant, "tolerance": big, "test": significant}[
        rule.switch_on
    ]

    reason = np.select(
        [
            inc == "",
            ~offered,
            ~np.isfinite(a),
            chal == inc,
            ~(b < a),
            big & significant & by_rule,
            big & by_rule,
            significant & by_rule,
        ],
        [
            Reason.NO_INCUMBENT,
            Reason.INCUMBENT_NOT_CANDIDATE,
            Reason.INCUMBENT_NOT_SCORED,
            Reason.INCUMBENT_IS_BEST,
            Reason.CHALLENGER_NOT_BETTER,
            Reason.GAIN_AND_SIGNIFICANT,
            Reason.GAIN_ABOVE_TOLERANCE,
            Reason.SIGNIFICANT,
        ],
        Reason.WITHIN_TOLERANCE,
    ).astype(object)
    forced = np.isin(reason, [Reason.NO_INCUMBENT, Reason.INCUMBENT_NOT_CANDIDATE, Reason.INCUMBENT_NOT_SCORED])
    switched = np.isin(reason, [Reason.GAIN_AND_SIGNIFICANT, Reason.GAIN_ABOVE_TOLERANCE, Reason.SIGNIFICANT])
    chosen = np.where(forced | switched, chal, inc)
    decision = np.where(reason == Reason.NO_INCUMBENT, "first", np.where(forced | switched, "switch", "keep")).astype(
        object
    )
    detail = [
        _sentence(*row, rule) for row in zip(inc, chal, chosen, reason, a, b, gain, p, strict=True)
    ]  # one per class
    return pd.DataFrame(
        {
            "incumbent": inc,
            "challenger": chal,
            "chosen": chosen,
            "decision": decision,
            "reason": [str(r) for r in reason],
            "incumbent_score": a,
            "challenger_score": b,
            "relative_gain": gain,
            "p_value": p,
            "tolerance": rule.tolerance,
            "level": rule.level,
            "detail": detail,
        },
        columns=DECISION_COLUMNS,
    )


def _sentence(inc, chal, chosen, reason, a, b, gain, p, rule: StabilityRule) -> str:
    test = "not tested" if np.isnan(p) else f"DM-HLN p = {p:.3g} (level {rule.level:g})"
    if reason == Reason.NO_INCUMBENT:
        return f"no previous choice: {chosen} (score {b:.4g}) is the best"
    if reason == Reason.INCUMBENT_NOT_CANDIDATE:
        return f"previous choice {inc} is no longer a candidate: {chosen} (score {b:.4g}) is the best"
    if reason == Reason.INCUMBENT_NOT_SCORED:
        return f"previous choice {inc} has no score this cycle: {chosen} (score {b:.4g}) is the best"
    if reason == Reason.INCUMBENT_IS_BEST:
        return f"{inc} (score {a:.4g}) is still the best"
    if reason == Reason.CHALLENGER_NOT_BETTER:
        return f"keep {inc} (score {a:.4g}): {chal} does not score lower ({b:.4g})"
    change = (
        f"{chal} scores {b:.4g} against {inc}'s {a:.4g}, {100 * gain:.2f} % better "
        f"(tolerance {100 * rule.tolerance:g} %), {test}"
    )
    if reason == Reason.WITHIN_TOLERANCE:
        return f"keep {inc}: {change}"
    return f"switch to {chal}: {change}"
