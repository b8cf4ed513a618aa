"""The report's section on the backtest's choices: each class's strategy and share split, configured against best.

From the stored `strategy_choice` and `share_tuning` (the decisions the cycle
made, not made again from today's config): the strategy with its decision and
reason, its leaf WMAPE and RMSSE and the metric it was judged by; the share
window and method followed, the configured ones, the best candidate and the
gain (how much better, relatively, the best candidate scored than the one
followed).
"""

from __future__ import annotations

import pandas as pd

CHOICE_HEADERS = [
    "class", "judged by", "strategy", "leaf WMAPE", "leaf RMSSE", "strategy decision", "share split followed",
    "configured", "best split", "gain", "split decision",
]


def choice_rows(strategy_choice: pd.DataFrame | None, share_tuning: pd.DataFrame | None) -> list[list]:
    """One row per class (CHOICE_HEADERS), blanks where a table is missing."""
    classes: list[str] = []
    for frame in (strategy_choice, share_tuning):
        if frame is not None and len(frame):
            classes += [c for c in frame["product_class"].unique() if c not in classes]
    rows = []
    for name in classes:
        row = [name] + [""] * (len(CHOICE_HEADERS) - 1)
        if strategy_choice is not None and len(strategy_choice):
            mine = strategy_choice[strategy_choice["product_class"] == name]
            if len(mine):
                c = mine.iloc[0]
                row[1:6] = [
                    c.get("metric", "wmape"), c["strategy"], f"{c['leaf_wmape']:.3f}",
                    f"{c.get('leaf_rmsse', float('nan')):.3f}", f"{c.get('decision', '')}: {c.get('detail', '')}",
                ]
        if share_tuning is not None and len(share_tuning):
            mine = share_tuning[share_tuning["product_class"] == name]
            chosen, best = mine[mine["chosen"].astype(bool)], mine[mine["best"].astype(bool)]
            if len(chosen) and len(best):
                c, b = chosen.iloc[0], best.iloc[0]
                row[6:] = [
                    f"{c['candidate']} ({c['metric']} {c['score']:.4f})",
                    f"{c['configured_method']}/{c['configured_window']}",
                    f"{b['candidate']} ({b['score']:.4f})", f"{c['gain']:.1%}", f"{c['decision']}: {c['detail']}",
                ]
        rows.append(row)
    return rows
