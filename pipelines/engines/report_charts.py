"""Pictures of one cycle: what a planner looks at after the run.

Pure functions: frames of one cycle in (one product class where said), PNG
bytes or an HTML string out. Nothing here reads the store or knows of Dagster.

- `parent_chart`: per product class, the class total on top and small
  multiples of the largest parents (product x site) by history volume: their
  history (lifecycle history summed to product x site) and their forecast over
  the horizon, the cycle date marked and the horizon shaded. The parents not
  drawn are named in a caption, so none is silently left out.
- `share_chart`: per product class, one panel per largest parent: each
  customer's share of its parent as a stacked area (stepped: one full-width
  bar per period, so a period covers its bucket and a lone period of an
  intermittent series stays visible), over history (the
  customer's quantity / the parent's quantity in each period) and over the
  horizon (the period shares of `reinitialized_target`). Customers beyond the
  `top_children` largest (by mean share over the drawn periods) are summed as
  "other". A history period without parent volume, or with a recorded supply
  shortage, has no share and is left blank, as the share rule leaves it out.
- `cycle_report_html`: a self-contained page (inline CSS, no script, images by
- `corrections_chart`: the corrections of cleaned history per product class
  and rule, as stacked bars.

Rendering is deterministic (`chart_base`). Each chart has a `*_figure`
function returning the figure, so tests read the plotted data back from the
artists.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
from matplotlib import dates as mdates
from matplotlib.figure import Figure
from matplotlib.ticker import PercentFormatter

from pipelines.calendar import shift_periods
from pipelines.engines.chart_base import (
    CHILD_COLORS,
    CYCLE_COLOR,
    DPI,
    FORECAST_COLOR,
    HISTORY_COLOR,
    OTHER,
    OTHER_COLOR,
    WIDTH_IN,
    _bars,
    _caption,
    _caption_axes,
    _date_axis,
    _empty_figure,
    _history_of,
    _in_class,
    _mark_horizon,
    _next_starts,
    _parent_label,
    _quantity_axis,
    _rank_parents,
    chart_file_name,
    figure_png,
)
from pipelines.keys import LEAF, PARENT

__all__ = ["DPI", "WIDTH_IN", "CHILD_COLORS", "FORECAST_COLOR", "chart_file_name", "figure_png"]


# ----------------------------------------------------------------- 1. parent history and forecast
def parent_chart_figure(
    history: pd.DataFrame,
    parent_forecast: pd.DataFrame,
    *,
    product_class: str,
    cycle_date,
    period: str = "week",
    top_parents: int = 6,
    columns: int = 2,
    history_periods: int | None = None,
) -> Figure:
    """The figure behind `parent_chart` (see there)."""
    cycle = pd.Timestamp(cycle_date)
    title = f"Product class {product_class}: parent history and forecast, cycle {cycle:%Y-%m-%d}"
    unit = f"quantity per {period}"
    fc = _in_class(parent_forecast, product_class)
    parents = fc[PARENT].drop_duplicates()
    if parents.empty:
        return _empty_figure(title, f"no parent of class {product_class} has a forecast in this cycle")
    hist = _history_of(history, parents, cycle, period, history_periods)
    hist = hist.groupby(PARENT + ["period_start"], observed=True, as_index=False)["quantity"].sum()
    bands = interval_levels(fc)
    bound_cols = [c for lv in bands for c in (f"lower_{lv}", f"upper_{lv}")]
    fc = fc.groupby(PARENT + ["period_start"], observed=True, as_index=False)[["forecast"] + bound_cols].sum()
    ranked = _rank_parents(hist, fc, parents)
    shown = ranked.head(max(int(top_parents), 0))
    hidden = ranked.iloc[len(shown):]
    horizon_end = shift_periods(fc["period_start"].max(), 1, period)
    class_volume = float(ranked["history_volume"].sum())

    rows = math.ceil(len(shown) / columns) if len(shown) else 0
    shown_part = float(shown["history_volume"].sum()) / class_volume if class_volume > 0 else float("nan")
    caption = (
        f"Top panel: all {len(ranked)} parents of the class summed. Small panels: the {len(shown)} largest parents by "
        f"history volume{'' if math.isnan(shown_part) else f' ({shown_part:.0%} of the class history)'}; "
        "each panel has its own scale. History: lifecycle history summed to product x site. Forecast: "
        "parent_forecast. "
        f"Shaded: the horizon."
        + (
            f" Bands on the parents: their {' and '.join(b + ' %' for b in bands)} prediction intervals "
            "(parent_forecast lower_/upper_ columns)."
            if bands
            else ""
        )
    )
    names = [_parent_label(p, s) for p, s in zip(hidden["product"], hidden["site"], strict=False)]
    lines = _caption(caption, names, f"Not drawn ({len(hidden)}, largest first): ")

    height = 3.0 + 2.1 * rows + 0.3 + 0.14 * len(lines)
    fig = Figure(figsize=(WIDTH_IN, height), dpi=DPI, layout="constrained")
    grid = fig.add_gridspec(rows + 2, columns, height_ratios=[2.4] + [2.1] * rows + [0.2 + 0.14 * len(lines)])
    fig.suptitle(title, fontsize=13, fontweight="bold")

    total = fig.add_subplot(grid[0, :])
    th = hist.groupby("period_start")["quantity"].sum().sort_index()
    tf = fc.groupby("period_start")["forecast"].sum().sort_index()
    _mark_horizon(total, cycle, horizon_end, label=True)
    total.plot(th.index, th.to_numpy(), color=HISTORY_COLOR, lw=1.2, label="history")
    total.plot(tf.index, tf.to_numpy(), color=FORECAST_COLOR, lw=2.0, label="forecast")
    total.set_title(f"Class total, {len(ranked)} parents", fontsize=11, loc="left")
    _quantity_axis(total, unit)
    _date_axis(total)
    total.legend(loc="upper left", fontsize=8, frameon=False, ncols=3)

    hist_by = {k: g for k, g in hist.merge(shown[PARENT], on=PARENT).groupby(PARENT, observed=True)}
    fc_by = {k: g for k, g in fc.merge(shown[PARENT], on=PARENT).groupby(PARENT, observed=True)}
    for i, row in enumerate(shown.itertuples(index=False)):
        ax = fig.add_subplot(grid[1 + i // columns, i % columns], sharex=total)
        key = (row.product, row.site)
        _mark_horizon(ax, cycle, horizon_end, label=False)
        h = hist_by.get(key)
        f = fc_by.get(key)
        if h is not None:
            h = h.sort_values("period_start")
            ax.plot(h["period_start"], h["quantity"].to_numpy(), color=HISTORY_COLOR, lw=0.9, label="history")
        if f is not None:
            f = f.sort_values("period_start")
            for k, lv in enumerate(sorted(bands, key=float, reverse=True)):  # widest first, lighter
                ax.fill_between(
                    f["period_start"], f[f"lower_{lv}"].to_numpy(float), f[f"upper_{lv}"].to_numpy(float),
                    color=FORECAST_COLOR, alpha=0.15 + 0.15 * k, lw=0, label=f"{lv} % interval",
                )
            ax.plot(f["period_start"], f["forecast"].to_numpy(), color=FORECAST_COLOR, lw=1.8, label="forecast")
        part = row.history_volume / class_volume if class_volume > 0 else float("nan")
        share_text = "" if math.isnan(part) else f"  ({part:.0%} of class history)"
        ax.set_title(f"{_parent_label(row.product, row.site)}{share_text}", fontsize=9, loc="left")
        _quantity_axis(ax, unit if i % columns == 0 else "")
        _date_axis(ax)
    _caption_axes(fig, grid[rows + 1, :], lines)
    return fig


def interval_levels(frame: pd.DataFrame) -> list[str]:
    """The interval levels whose lower_ and upper_ columns the frame holds (as written, e.g. '80')."""
    lower = {c[len("lower_"):] for c in frame.columns if c.startswith("lower_")}
    return sorted((lv for lv in lower if f"upper_{lv}" in frame.columns), key=float)


def parent_chart(
    history: pd.DataFrame,
    parent_forecast: pd.DataFrame,
    *,
    product_class: str,
    cycle_date,
    period: str = "week",
    top_parents: int = 6,
    columns: int = 2,
    history_periods: int | None = None,
) -> bytes:
    """PNG of one product class's parents: class total on top, the `top_parents` largest below.

    history: leaf or parent rows with `product, site, period_start, quantity`
    (lifecycle or cleaned history; summed here to product x site; rows of
    parents without a forecast in `parent_forecast` are ignored, so the whole
    table may be passed). parent_forecast: `product, site, period_start,
    forecast` (and `product_class`, filtered to `product_class` when present).
    `history_periods` limits the history drawn to the last so many periods
    before the cycle date (None = all). The parents not drawn are listed in the
    caption, largest first.
    """
    fig = parent_chart_figure(
        history, parent_forecast, product_class=product_class, cycle_date=cycle_date, period=period,
        top_parents=top_parents, columns=columns, history_periods=history_periods,
    )
    return figure_png(fig)


# ----------------------------------------------------------------- 2. customer shares
def history_period_shares(history: pd.DataFrame) -> pd.DataFrame:
    """Each customer's share of its parent per history period: quantity / parent quantity.

    A period whose parent quantity is 0, or that has a recorded supply shortage
    (`shortage` on any of the parent's rows, when the column is there), has no
    share (NaN), as the share rule leaves such periods out.
    """
    leaf = history.groupby(LEAF + ["period_start"], observed=True, as_index=False)["quantity"].sum()
    parent = leaf.groupby(PARENT + ["period_start"], observed=True)["quantity"].transform("sum")
    share = leaf["quantity"] / parent.where(parent > 0)
    if "shortage" in history.columns:
        short = history[history["shortage"].astype(bool)][PARENT + ["period_start"]].drop_duplicates()
        flagged = leaf[PARENT + ["period_start"]].merge(
            short, how="left", on=PARENT + ["period_start"], indicator=True
        )["_merge"]
        share = share.where(~(flagged == "both").to_numpy())
    return leaf[LEAF + ["period_start"]].assign(share=share.to_numpy())


def _stack_for_parent(
    hist_shares: pd.DataFrame, target: pd.DataFrame, top_children: int
) -> tuple[pd.DataFrame, list[str], int]:
    """(periods x bands) shares of one parent, bands = the largest customers then `other`; and the count in other."""
    both = pd.concat(
        [hist_shares[["customer", "period_start", "share"]], target[["customer", "period_start", "share"]]]
    )
    wide = both.pivot(index="period_start", columns="customer", values="share")
    # a period where the parent has no share at all (blank history period) stays blank in every band
    blank = wide.isna().all(axis=1)
    wide = wide.fillna(0.0)
    wide[blank] = np.nan
    mean = wide.mean(axis=0, skipna=True)
    order = sorted(wide.columns, key=lambda c: (-mean[c], str(c)))
    top = order[: max(int(top_children), 0)]
    rest = order[len(top):]
    bands = wide[top].copy()
    if rest:
        bands[OTHER] = wide[rest].sum(axis=1, min_count=1)
    return bands.sort_index(), top, len(rest)


def share_chart_figure(
    history: pd.DataFrame,
    target: pd.DataFrame,
    *,
    product_class: str,
    cycle_date,
    period: str = "week",
    top_parents: int = 4,
    top_children: int = 5,
    history_periods: int | None = None,
    shares: pd.DataFrame | None = None,
) -> Figure:
    """The figure behind `share_chart` (see there)."""
    cycle = pd.Timestamp(cycle_date)
    title = f"Product class {product_class}: customer shares of the largest parents, cycle {cycle:%Y-%m-%d}"
    tgt = _in_class(target, product_class)
    tgt = tgt[tgt["period_start"] >= cycle]
    parents = tgt[PARENT].drop_duplicates()
    if parents.empty:
        return _empty_figure(title, f"no parent of class {product_class} has a reinitialized target in this cycle")
    hist = _history_of(history, parents, cycle, period, history_periods)
    ranked = _rank_parents(hist, tgt.assign(forecast=tgt["target"]), parents)
    shown = ranked.head(max(int(top_parents), 0))
    hidden = ranked.iloc[len(shown):]
    hist_shares = history_period_shares(hist.merge(shown[PARENT], on=PARENT))
    horizon_end = shift_periods(tgt["period_start"].max(), 1, period)
    window_start = {}
    if shares is not None and len(shares):
        first = shares.drop_duplicates(PARENT)
        window_start = {
            (p, s): pd.Timestamp(w)
            for p, s, w, u in zip(
                first["product"], first["site"], first["window_start"], first["window_used"], strict=False
            )
            if u > 0
        }

    caption = (
        f"Each panel: one parent's customers, each band a customer's share of the parent in each period; before the "
        f"cycle date from history (customer quantity / parent quantity; blank where the parent had no volume or a "
        f"recorded shortage), after it the period shares of the reinitialized target. Up to {top_children} customers "
        f"by mean share per parent; the rest summed as '{OTHER}'. Parents drawn: the {len(shown)} largest of "
        f"{len(ranked)} by history volume."
    )
    if shares is not None:
        caption += " Dotted line: start of the window the shares were computed over."
    names = [_parent_label(p, s) for p, s in zip(hidden["product"], hidden["site"], strict=False)]
    lines = _caption(caption, names, f"Not drawn ({len(hidden)}, largest first): ")

    rows = len(shown)
    fig = Figure(figsize=(WIDTH_IN, 0.8 + 2.3 * rows + 0.3 + 0.14 * len(lines)), dpi=DPI, layout="constrained")
    grid = fig.add_gridspec(rows + 1, 1, height_ratios=[2.3] * rows + [0.2 + 0.14 * len(lines)])
    fig.suptitle(title, fontsize=13, fontweight="bold")
    hist_by = {k: g for k, g in hist_shares.groupby(PARENT, observed=True)}
    tgt_by = {k: g for k, g in tgt.merge(shown[PARENT], on=PARENT).groupby(PARENT, observed=True)}
    first_ax = None
    for i, row in enumerate(shown.itertuples(index=False)):
        key = (row.product, row.site)
        ax = fig.add_subplot(grid[i, 0], sharex=first_ax)
        first_ax = first_ax or ax
        empty = hist_shares.iloc[:0]
        bands, top, n_rest = _stack_for_parent(hist_by.get(key, empty), tgt_by[key], top_children)
        _mark_horizon(ax, cycle, horizon_end, label=i == 0)
        # one full-width bar per period (a stepped stacked area): a period stands for its whole bucket,
        # and a lone period of an intermittent series stays visible
        left = mdates.date2num(bands.index)
        width = mdates.date2num(_next_starts(bands.index, period)) - left
        at_cycle = bands[bands.index >= cycle].iloc[0] if (bands.index >= cycle).any() else None
        bottom = np.zeros(len(bands))
        drawn = ~bands.isna().all(axis=1).to_numpy()
        for j, column in enumerate(bands.columns):
            values = bands[column].fillna(0.0).to_numpy(dtype=float)
            label = f"{OTHER} ({n_rest} customer{'s' if n_rest > 1 else ''})" if column == OTHER else str(column)
            if at_cycle is not None:
                label += f"  {at_cycle[column]:.1%}"
            color = OTHER_COLOR if column == OTHER else CHILD_COLORS[j % len(CHILD_COLORS)]
            ax.add_collection(
                _bars(left[drawn], width[drawn], bottom[drawn], values[drawn], color=color, label=label), autolim=True
            )
            bottom = bottom + values
        if key in window_start:
            ax.axvline(
                window_start[key],
                color=CYCLE_COLOR,
                ls=":",
                lw=1.0,
                zorder=3,
                label="share window start" if i == 0 else None,
            )
        ax.autoscale_view()
        ax.set_ylim(0, 1)
        ax.yaxis.set_major_formatter(PercentFormatter(1.0, decimals=0))
        ax.set_ylabel("share of parent")
        ax.set_title(f"{_parent_label(row.product, row.site)}: {len(top) + n_rest} customers", fontsize=10, loc="left")
        _date_axis(ax)
        # legend top to bottom as the bands are stacked: the largest customer at the bottom of both
        handles, labels = ax.get_legend_handles_labels()
        bands_first = [k for k, l in enumerate(labels) if not l.startswith(("cycle date", "share window"))]
        lines_first = [k for k in range(len(labels)) if k not in bands_first]
        order = bands_first[::-1] + lines_first
        ax.legend(
            [handles[k] for k in order],
            [labels[k] for k in order],
            loc="center left",
            bbox_to_anchor=(1.01, 0.5),
            fontsize=8,
            frameon=False,
            title="share at cycle date" if at_cycle is not None else None,
            title_fontsize=8,
        )
    _caption_axes(fig, grid[rows, 0], lines)
    return fig


def share_chart(
    history: pd.DataFrame,
    target: pd.DataFrame,
    *,
    product_class: str,
    cycle_date,
    period: str = "week",
    top_parents: int = 4,
    top_children: int = 5,
    history_periods: int | None = None,
    shares: pd.DataFrame | None = None,
) -> bytes:
    """PNG of the customers' shares of the `top_parents` largest parents of one class, stacked.

    history: `product, site, customer, period_start, quantity` (lifecycle
    history; optional `shortage`). target: the class's `reinitialized_target`
    rows (`product, site, customer, period_start, share, target`; filtered to
    `product_class` when it has that column). shares (optional): the class's
    `share_tables` rows; when given, each panel marks the start of its parent's
    share window (`window_start`). Parents are ranked by history volume.
    """
    fig = share_chart_figure(
        history, target, product_class=product_class, cycle_date=cycle_date, period=period, top_parents=top_parents,
        top_children=top_children, history_periods=history_periods, shares=shares,
    )
    return figure_png(fig)



# ----------------------------------------------------------------- 3. history corrections
def corrections_chart(by_class_and_rule: pd.DataFrame, classes: list[str], shortage_periods: int) -> bytes:
    """PNG of the corrections per product class and rule (`product_class, rule, rows`), as stacked bars."""
    table = by_class_and_rule.pivot_table(
        index="product_class", columns="rule", values="rows", aggfunc="sum", fill_value=0
    )
    table = table.reindex(sorted(set(classes) | set(table.index)), fill_value=0)
    fig = Figure(figsize=(7, 1.2 + 0.4 * max(len(table), 1)), dpi=DPI)
    ax = fig.add_subplot()
    if len(table) and len(table.columns):
        table.plot.barh(stacked=True, ax=ax, width=0.7)
        ax.legend(title="rule", fontsize=8, title_fontsize=8, loc="upper left", bbox_to_anchor=(1.01, 1.0))
    ax.set_xlabel("corrected periods")
    ax.set_ylabel("")
    ax.set_title(f"history corrections by class and rule; {shortage_periods} shortage periods flagged", fontsize=9)
    fig.tight_layout()
    return figure_png(fig)
