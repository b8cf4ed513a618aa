"""The sections of `explain`: share, lifecycle, corrections, forecast; and how their numbers are written."""

from __future__ import annotations

import numpy as np
import pandas as pd

from pipelines.calendar import shift_periods
from pipelines.vocabulary import AUTO
from pipelines.vocabulary_text import LIFECYCLE_RULE_TEXT, SHARE_METHOD_TEXT, STRATEGY_TEXT


def qty(x: float) -> str:
    return f"{x:,.2f}"


def as_share(x: float) -> str:
    return f"{x:.6f} ({100 * x:.2f} %)"


def day(x) -> str:
    return f"{pd.Timestamp(x):%Y-%m-%d}"


def leaf_rows(frame: pd.DataFrame, product: str, site: str, customer: str | None = None) -> pd.DataFrame:
    mask = (frame["product"] == product) & (frame["site"] == site)
    if customer is not None:
        mask &= frame["customer"] == customer
    return frame[mask]


def share_section(row: pd.Series, kind: str) -> list[str]:
    cycle = pd.Timestamp(row["cycle_date"])
    used, window = int(row["window_used"]), int(row["window"])
    lines = ["1. Share from history"]
    if row["fallback"] == "even" or used == 0:
        lines.append(
            f"   No window had parent volume (the configured {window} {kind}s, nor the fallback windows): "
            "fallback 'even', "
            f"the established customers of the parent share evenly."
        )
    else:
        last = shift_periods(cycle, -1, kind)
        lines.append(
            f"   Window: the {used} {kind}s before the cycle date, {day(row['window_start'])} to {day(last)}."
        )
        if row["fallback"] == "longer_window":
            lines.append(
                f"   Fallback 'longer_window': the configured {window}-{kind} window had no parent volume, so "
                f"{used} {kind}s were used."
            )
        else:
            lines.append(f"   The configured window ({window} {kind}s) had parent volume: no fallback.")
        lines.append(f"   Method: {SHARE_METHOD_TEXT.get(str(row['method']), str(row['method']))}.")
        child, parent = float(row["child_volume"]), float(row["parent_volume"])
        text = f"   In the window the customer shipped {qty(child)} of the parent's {qty(parent)}"
        if row["method"] == "mean_of_ratios" and parent > 0:
            text += f" (pooled would give {child / parent:.6f}; this method averages the periods' proportions instead)"
        lines.append(text + ".")
    history_share = float(row["history_share"])
    if row["lifecycle_rule"] in ("reference", "initial_share", "awaiting_history"):
        lines.append(
            f"   As a new customer ({int(row['own_periods'])} own periods of history) it is left out of the history "
            f"shares: history share {as_share(history_share)}."
        )
    else:
        lines.append(f"   History share over the parent's established customers: {as_share(history_share)}.")
    return lines


def lifecycle_section(row: pd.Series, siblings: pd.DataFrame, audit: pd.DataFrame | None) -> list[str]:
    rule = str(row["lifecycle_rule"])
    lines = ["2. Lifecycle", f"   Rule: {LIFECYCLE_RULE_TEXT.get(rule, rule)}."]
    if rule == "reference":
        ref = siblings[siblings["customer"] == row["reference_customer"]]
        scale = float(row["scale"]) if pd.notna(row.get("scale")) else float("nan")
        text = f"   Reference customer {row['reference_customer']}, scale {scale:g}"
        if len(ref) and not np.isnan(scale):
            h = float(ref["history_share"].iloc[0])
            text += f": {scale:g} x {h:.6f} (its history share) = {scale * h:.6f} taken from it"
            text += " (less when several new customers take more than the reference has)"
        lines.append(text + ".")
    if rule == "initial_share" and pd.notna(row.get("initial_share")):
        lines.append(f"   Initial share given by the planner: {as_share(float(row['initial_share']))}.")
    detail = str(row.get("lifecycle_detail") or "")
    if detail:
        lines.append(f"   In the share table: {detail}.")
    lines.append(
        f"   Active in the horizon from {day(row['first_active_period'])} to {day(row['last_active_period'])}; "
        f"{int(row['own_periods'])} periods of own history."
    )
    lines.append(f"   Base share (every customer of the parent active): {as_share(float(row['share']))}.")
    if audit is not None:
        mine = leaf_rows(audit, row["product"], row["site"], row["customer"])
        for a in mine.itertuples(index=False):
            lines.append(
                f"   Lifecycle stage: {a.rule}, {int(a.periods)} periods, quantity {qty(float(a.quantity))} "
                f"({a.detail})."
            )
    return lines


def corrections_section(row: pd.Series, corrections: pd.DataFrame | None, history: pd.DataFrame | None) -> list[str]:
    lines = ["3. Corrections to its history"]
    if corrections is None:
        return lines + ["   (history_corrections not given)"]
    products = {row["product"]}
    if history is not None:
        mine = leaf_rows(history, row["product"], row["site"], row["customer"])
        products |= set(mine["source_product"].unique())
    hit = corrections[
        corrections["product"].isin(products)
        & (corrections["site"] == row["site"])
        & (corrections["customer"] == row["customer"])
    ]
    if hit.empty:
        return lines + ["   None: no rule changed a period of this customer's history."]
    by_rule = hit.groupby("rule").agg(periods=("delta", "size"), delta=("delta", "sum")).sort_index()
    parts = [
        f"{rule} {int(r.periods)} period{'s' if r.periods > 1 else ''} (net {float(r.delta):+,.2f})"
        for rule, r in by_rule.iterrows()
    ]
    lines.append(f"   {len(hit)} corrected period{'s' if len(hit) > 1 else ''}: {'; '.join(parts)}.")
    other = sorted(set(hit["product"]) - {row["product"]})
    if other:
        lines.append(f"   (including history recorded on {', '.join(other)} and mapped to {row['product']})")
    return lines


def choice_lines(product_class: str, choice: pd.DataFrame | None) -> list[str]:
    """How the class's strategy was decided, from the stored strategy_choice (nothing without it)."""
    if choice is None or choice.empty:
        return []
    mine = choice[choice["product_class"] == product_class]
    if mine.empty:
        return []
    c = mine.iloc[0]
    how = "the backtest's choice (strategy: auto)" if c["configured_strategy"] == AUTO else "configured"
    text = f"   Decided for the class this cycle: {STRATEGY_TEXT.get(c['strategy'], c['strategy'])}; {how}"
    if pd.notna(c["leaf_wmape"]):
        text += f"; backtest leaf WMAPE {float(c['leaf_wmape']):.3f}"
        if c["runner_up"] and pd.notna(c["margin"]):
            text += f", margin {float(c['margin']):+.4f} over {c['runner_up']}"
    if isinstance(c.get("seasonality"), str) and c["seasonality"]:
        text += f"; seasonality {c['seasonality']} (with it the backtest scored the strategy)"
    lines = [text + "."]
    if "detail" in c and c["detail"]:
        lines.append(f"   Judged by leaf {c['metric']}; {c['decision']}: {c['detail']}.")
    return lines


SEASONALITY_TEXT = {
    "none": "Seasonality none: the model ran without a season",
    "own": "Seasonality own: the series' own seasonal model (where two full seasons of history exist)",
    "group": "Seasonality group: the model ran on the history divided by the group's seasonal index (estimated on "
    "the sum of the group's parents), and its forecast was multiplied by the index again (group seasonal indices)",
}


def seasonality_text(m: pd.Series) -> str:
    """The parent's seasonality in words, with its seasonal strengths (from forecast_models)."""
    mode = str(m.get("seasonality", "") or "")
    if not mode:
        return "Seasonality not recorded in forecast_models."
    text = SEASONALITY_TEXT.get(mode, f"Seasonality {mode}")
    strengths = []
    if pd.notna(m.get("group_seasonal_strength", np.nan)):
        strengths.append(f"the group's seasonal strength {float(m['group_seasonal_strength']):.2f}")
    if pd.notna(m.get("seasonal_strength", np.nan)):
        strengths.append(f"the parent's own {float(m['seasonal_strength']):.2f}")
    return text + (f"; {', '.join(strengths)} (0 none, 1 all season)." if strengths else ".")


def interval_section(leaf: pd.DataFrame, strategy: str | None, period=None) -> list[str]:
    """The leaf's prediction intervals per horizon period (or the one period asked), and how they were made."""
    bounds = sorted({c.split("_", 1)[1] for c in leaf.columns if c.startswith(("lower_", "upper_"))}, key=float)
    if not bounds or leaf.empty:
        return []
    rows = leaf.sort_values("period_start")
    if period is not None:
        rows = rows[rows["period_start"] == period]
    how = {
        "top_down": "the parent's interval (statsforecast) times the leaf's weight in the period, the weights taken "
        "as fixed, so the shares' own uncertainty is left out",
        "forecast_proportions": "the parent's interval (statsforecast) times the leaf's weight in the period, the "
        "weights taken as fixed",
        "bottom_up": "the customer's own model's normal interval (statsforecast)",
        "mint_shrink": "the normal approximation of the reconciled forecast (MinT covariance S P W P' S')",
        "wls_var": "the normal approximation of the reconciled forecast (WLS covariance S P W P' S')",
    }.get(str(strategy), "the strategy's intervals")
    lines = ["", f"6. Prediction intervals ({', '.join(b + ' %' for b in bounds)}): {how}; lower bounds cut at 0."]
    head = f"   {'period':<10}" + "".join(f"  {'lower ' + b:>12}  {'upper ' + b:>12}" for b in bounds)
    lines += [head]
    for r in rows.itertuples(index=False):
        cells = "".join(f"  {qty(getattr(r, 'lower_' + b)):>12}  {qty(getattr(r, 'upper_' + b)):>12}" for b in bounds)
        lines.append(f"   {day(r.period_start):<10}{cells}")
    return lines


def forecast_section(
    row: pd.Series, horizon: pd.DataFrame, parent: pd.DataFrame, models: pd.DataFrame | None,
    choice: pd.DataFrame | None = None,
) -> list[str]:
    product, site, customer = row["product"], row["site"], row["customer"]
    first = parent.iloc[0]
    lines = [f"4. Parent forecast {product} x {site}"]
    model = str(first["model"])
    detail = cut = ""
    if models is not None:
        m = models[(models["grain"] == "parent") & (models["product"] == product) & (models["site"] == site)]
        if len(m):
            m = m.iloc[0]
            detail = f", {m['parameters']}" if m["parameters"] else ""
            measures = [
                f"ADI {float(m['adi']):.2f}" if pd.notna(m["adi"]) else "",
                f"CV^2 {float(m['cv2']):.3f}" if pd.notna(m["cv2"]) else "",
            ]
            if any(measures):
                cut = f"{', '.join(x for x in measures if x)}; cut-offs ADI 1.32, CV^2 0.49"
            season = seasonality_text(m)
    lines.append(f"   Model {model}{detail}.")
    if models is not None and len(m):
        lines.append(f"   {season}")
    lines.append(f"   Demand class {first['demand_class']}{f' ({cut})' if cut else ''}.")
    strategy = first.get("strategy") if "strategy" in parent.columns else None
    named = (
        f"Strategy {strategy}" if isinstance(strategy, str) and strategy else "Strategy not recorded in parent_forecast"
    )
    lines.append(f"   {named} (models ran at grain: {first['model_grain']}).")
    lines += choice_lines(row["product_class"], choice)
    if models is not None:
        leaf_model = models[
            (models["grain"] == "leaf")
            & (models["product"] == product)
            & (models["site"] == site)
            & (models["customer"] == customer)
        ]
        if len(leaf_model):
            lm = leaf_model.iloc[0]
            parameters = f", {lm['parameters']}" if lm["parameters"] else ""
            own = f"model {lm['model']}{parameters}; demand class {lm['demand_class']}"
            lines.append(f"   The customer's own series: {own}.")
    total = float(horizon["parent_forecast"].sum())
    lines.append(f"   Parent forecast over the {len(horizon)} horizon periods: {qty(total)}.")
    return lines
