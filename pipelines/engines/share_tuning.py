"""Share window and method by backtest: every candidate's top-down leaf accuracy, the choice and its reason.

At each backtest origin the parent forecast of the class's models is split by
the share table each candidate (window x method) gives from the history
before the origin, and the leaf forecast is scored like the strategies are
(`pipelines.engines.backtest_scores`). The candidates of a class are
`selection.share_tuning.windows` x `.methods`, plus its configured window and
method; windows longer than the history before the cycle date are left out.
The per-period methods (`seasonal`, `children_forecast`) split by period
shares that the window does not change (only their pooled fallback): they are
tried at one window, the class's configured one, else the longest candidate.
`children_forecast` fits a model per leaf at every origin (most of a fixed
class's backtest): a class with a fixed window and method leaves it out unless
it is the configured method (`selection.share_tuning.leaf_fit_candidates:
auto_only`, the default; `always` keeps it), and its row says so.

A class's *own* candidates are those that keep what it fixes: `window: auto`
varies the window only, `method: auto` the method only, both the pair. Its
*score* is its selection metric (WMAPE, RMSSE or MASE by demand class,
`scaled_errors.class_metric`). For an `auto` class the best own candidate
challenges last cycle's choice under the stability rule
(`forecast_comparison.stable_choice`: a relative gain above the tolerance or a
significant one-sided DM-HLN test on the per-period losses); a class with a
fixed window and method keeps them, and its row says how much better the
best candidate of the whole grid scored (`gain`, relative), which the WARN
check `share_choice_near_best` compares with `selection.share_tuning.max_gain`.
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np
import pandas as pd

from pipelines.engines.backtest_scores import ScoreBook
from pipelines.engines.forecast_comparison import StabilityRule, dm_test, stable_choice
from pipelines.engines.share_settings import ShareRule, ShareSettings
from pipelines.vocabulary import AUTO, LEAF_FIT_METHODS, PER_PERIOD_METHODS, LeafFitCandidates, ShareMethod

TUNING_COLUMNS = [
    "product_class", "window", "method", "candidate", "metric", "score", "wmape", "rmsse", "mase", "configured",
    "own", "best", "chosen", "configured_window", "configured_method", "gain", "decision", "reason", "detail",
]


def candidate_name(window: int, method: str) -> str:
    return f"{method}/{window}"


def left_out(configured: ShareRule, auto_window: bool, auto_method: bool, methods, setting: str) -> list[str]:
    """The candidate methods a class leaves out: under `leaf_fit_candidates: auto_only` a class with a fixed window
    and method leaves out those that fit leaf models (`LEAF_FIT_METHODS`), except its configured one."""
    if setting == LeafFitCandidates.ALWAYS or auto_window or auto_method:
        return []
    return [m for m in methods if m in LEAF_FIT_METHODS and m != configured.method]


def class_candidates(
    configured: ShareRule, auto_window: bool, auto_method: bool, windows, methods, history_periods: int,
    leave_out=(),
) -> list[tuple[int, str, bool]]:
    """(window, method, own) of every candidate of one class; `own`: it keeps what the class fixes; the methods
    of `leave_out` (`left_out`) are not tried."""
    ws = [w for w in dict.fromkeys((*windows, *([] if auto_window else [configured.window]))) if w <= history_periods]
    ms = [m for m in dict.fromkeys((*methods, *([] if auto_method else [configured.method]))) if m not in leave_out]
    out = []
    for m in ms:
        if m == "smoothed" and configured.smoothing is None:
            continue  # no alpha to try
        tried = ws
        if m in PER_PERIOD_METHODS and ws:
            # their period shares do not depend on the window (only their pooled fallback does): one window,
            # the configured one, else the longest candidate
            tried = [max(ws)] if auto_window else [w for w in ws if w == configured.window]
        for w in tried:
            own = (auto_window or w == configured.window) and (auto_method or m == configured.method)
            out.append((w, m, own))
    return out


def candidate_settings(settings: ShareSettings, window: int, method: str, classes=None) -> ShareSettings:
    """Every class's rule with this window and method (its own fallbacks longer than the window, alpha, years);
    with `classes`, a method that fits leaf models is given to those alone and the others are pooled (their
    rows of this candidate are not scored, and fit no leaf models for it)."""
    def method_of(name: str) -> str:
        return method if classes is None or method not in LEAF_FIT_METHODS or name in classes else ShareMethod.POOLED

    return settings.with_rules({n: r.with_choice(window, method_of(n)) for n, r in settings.rules.items()})


def _p_value(book: ScoreBook, incumbent: str, challenger: str, i: int, metric: str, h: int) -> float:
    """One-sided DM-HLN p-value that `challenger` has the lower loss of class i (NaN when not testable)."""
    if incumbent not in book.losses or challenger not in book.losses or incumbent == challenger:
        return np.nan
    j = 1 if metric == "rmsse" else 0  # squared scaled loss for RMSSE, else absolute loss
    d = book.losses[incumbent][j][i] - book.losses[challenger][j][i]
    if len(d) <= h or not np.isfinite(d).all():
        return np.nan
    return float(dm_test(d, h=h, alternative="greater").p_value[0])


def decide(
    book: ScoreBook,
    grid: Mapping[str, list[tuple[int, str, bool]]],
    configured: Mapping[str, tuple[int | str, str]],
    metric: Mapping[str, str],
    previous: Mapping[str, str],
    rule: StabilityRule,
    omitted: Mapping[str, list[str]] | None = None,
) -> pd.DataFrame:
    """The share_tuning table: one row per class and candidate (TUNING_COLUMNS); `omitted`: per class, the
    methods it left out (`left_out`), named in its rows' detail."""
    rows = []
    for i, name in enumerate(book.classes):
        if name not in grid or not grid[name]:
            continue
        cw, cm = configured[name]
        m = metric[name]
        cands = grid[name]
        scores = {candidate_name(w, me): book.metrics(candidate_name(w, me), "leaf") for w, me, _ in cands}
        score = {c: float(v[m][i]) for c, v in scores.items()}
        key = {c: (np.inf if np.isnan(s) else s) for c, s in score.items()}
        own = [candidate_name(w, me) for w, me, o in cands if o]
        best_all = min(key, key=lambda c: key[c])  # first listed wins a tie
        best_own = min(own, key=lambda c: key[c]) if own else best_all
        auto = cw == AUTO or cm == AUTO
        if auto:
            inc = previous.get(name, "")
            inc_score = score.get(inc, np.nan)
            p = _p_value(book, inc, best_own, i, m, book.h) if inc else np.nan
            d = stable_choice([inc], [best_own], [inc_score], [score[best_own]], [p], rule, [inc in own]).iloc[0]
            chosen, decision, reason, detail = d["chosen"], d["decision"], d["reason"], d["detail"]
            reference = score.get(chosen, np.nan)
        else:
            chosen = candidate_name(cw, cm)
            decision, reason = "fixed", "configured"
            reference = score.get(chosen, np.nan)
            detail = f"configured {chosen}; best of the grid {best_all} ({score[best_all]:.4g} against {reference:.4g})"
            if omitted and omitted.get(name):
                detail += (f"; left out {', '.join(omitted[name])} (a model fit per leaf at every origin; "
                           "selection.share_tuning.leaf_fit_candidates: always tries it)")
        best = best_own if auto else best_all
        gain = (reference - score[best]) / reference if np.isfinite(reference) and reference > 0 else np.nan
        for w, me, o in cands:
            c = candidate_name(w, me)
            rows.append((
                name, w, me, c, m, score[c], *(float(scores[c][k][i]) for k in ("wmape", "rmsse", "mase")),
                not auto and c == chosen, o, c == best, c == chosen, str(cw), str(cm), gain, decision, reason, detail,
            ))
    return pd.DataFrame(rows, columns=TUNING_COLUMNS)


def chosen_rules(tuning: pd.DataFrame | None, settings: ShareSettings) -> ShareSettings:
    """`settings` with each class of the share_tuning table following its chosen window and method."""
    if tuning is None or tuning.empty:
        return settings
    chosen = tuning[tuning["chosen"].astype(bool)]
    rules = {
        r.product_class: settings.rules[r.product_class].with_choice(int(r.window), str(r.method))
        for r in chosen.itertuples()
        if r.product_class in settings.rules and not settings.rules[r.product_class].tuned
    }
    return settings.with_rules(rules)
