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
- `corrections_chart` (drawn in `chart_base`): the corrections of cleaned
  history per product class and rule, as stacked bars.

Rendering is deterministic (`chart_base`). Each chart has a `*_figure`
function returning the figure, so tests read the plotted data back from the
artists.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
from matplotlib.figure import Figure
from matplotlib.ticker import PercentFormatter

from pipelines.calendar import shift_periods
from pipelines.engines.chart_axes import date_ticks, quantity_axis, tick_label_width, value_ticks
from pipelines.engines.chart_base import (
    BARE_FOOT,
    CHILD_COLORS,
    CYCLE_COLOR,
    DATE_BAND,
    DPI,
    FORECAST_COLOR,
    HISTORY_COLOR,
    LINE_IN,
    OTHER,
    OTHER_COLOR,
    PANEL_HEAD,
    RIGHT_EDGE,
    SUPTITLE_BAND,
    TICK_BAND,
    WIDTH_IN,
    YLABEL_BAND,
    _bars,
    _caption,
    _caption_text,
    _empty_figure,
    _mark_horizon,
    _next_starts,
    _parent_label,
    _place,
    _text_width,
    _vline,
    _x,
    chart_file_name,
    corrections_chart,
    figure_png,
    in_class,
)
from pipelines.engines.chart_data import (
    HistorySums,
    history_period_shares,
    history_sums,
    parent_chart_data,
    share_chart_data,
    stack_for_parent,
)
from pipelines.keys import PARENT

TOTAL_HEIGHT = 2.1  # inches: the class total's axes
ROW_HEIGHT = 1.5  # a small panel's axes
SHARE_HEIGHT = 1.85  # a share panel's axes

__all__ = [
    "DPI", "WIDTH_IN", "CHILD_COLORS", "FORECAST_COLOR", "chart_file_name", "corrections_chart", "figure_png",
    "history_period_shares",
]


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
    summed: HistorySums | None = None,
) -> Figure:
    """The figure behind `parent_chart` (see there)."""
    cycle = pd.Timestamp(cycle_date)
    title = f"Product class {product_class}: parent history and forecast, cycle {cycle:%Y-%m-%d}"
    unit = f"quantity per {period}"
    summed = summed if summed is not None else history_sums(history, cycle, period, history_periods)
    data = parent_chart_data(in_class(parent_forecast, product_class), summed, top_parents)
    if data is None:
        return _empty_figure(title, f"no parent of class {product_class} has a forecast in this cycle")
    ranked, hist, hist_at, th, fc, fc_at, bands = data
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

    # heights in inches, top down: title, class total, the rows of panels (date labels under the lowest panel of
    # each column only: the panels share x), caption
    foot = [BARE_FOOT] * max(rows - 1, 0) + [DATE_BAND] * (rows > 0)
    total_top = SUPTITLE_BAND + PANEL_HEAD
    first_row = total_top + TOTAL_HEIGHT + DATE_BAND + PANEL_HEAD
    row_tops = np.cumsum([first_row] + [ROW_HEIGHT + f + PANEL_HEAD for f in foot])
    caption_top = row_tops[-1] - PANEL_HEAD + 0.1 if rows else total_top + TOTAL_HEIGHT + DATE_BAND
    height = caption_top + LINE_IN * len(lines) + 0.1
    fig = Figure(figsize=(WIDTH_IN, height), dpi=DPI)
    fig.suptitle(title, fontsize=13, fontweight="bold", y=1.0 - 0.12 / height, va="top")

    total = fig.add_axes((0, 0, 1, 1))
    tf = fc.groupby("period_start")["forecast"].sum().sort_index()
    _mark_horizon(total, cycle, horizon_end, label=True)
    total.plot(_x(th.index), th.to_numpy(), color=HISTORY_COLOR, lw=1.2, label="history")
    total.plot(_x(tf.index), tf.to_numpy(), color=FORECAST_COLOR, lw=2.0, label="forecast")
    total.set_title(f"Class total, {len(ranked)} parents", fontsize=11, loc="left", y=1.0)
    quantity_axis(total, unit)
    total.legend(loc="upper left", fontsize=8, frameon=False, ncols=3)

    panels = []
    for i, row in enumerate(shown.itertuples(index=False)):
        ax = fig.add_axes((0, 0, 1, 1), sharex=total)
        panels.append(ax)
        _mark_horizon(ax, cycle, horizon_end, label=False)
        h = hist[hist_at == row.pos] if (hist_at == row.pos).any() else None
        f = fc[fc_at == row.pos] if (fc_at == row.pos).any() else None
        if h is not None:
            h = h.sort_values("period_start")
            ax.plot(_x(h["period_start"]), h["quantity"].to_numpy(), color=HISTORY_COLOR, lw=0.9, label="history")
        if f is not None:
            f = f.sort_values("period_start")
            for k, lv in enumerate(sorted(bands, key=float, reverse=True)):  # widest first, lighter
                ax.fill_between(
                    _x(f["period_start"]), f[f"lower_{lv}"].to_numpy(float), f[f"upper_{lv}"].to_numpy(float),
                    color=FORECAST_COLOR, alpha=0.15 + 0.15 * k, lw=0, label=f"{lv} % interval",
                )
            ax.plot(_x(f["period_start"]), f["forecast"].to_numpy(), color=FORECAST_COLOR, lw=1.8, label="forecast")
        part = row.history_volume / class_volume if class_volume > 0 else float("nan")
        share_text = "" if math.isnan(part) else f"  ({part:.0%} of class history)"
        ax.set_title(f"{_parent_label(row.product, row.site)}{share_text}", fontsize=9, loc="left", y=1.0)
        quantity_axis(ax, unit if i % columns == 0 else "")
    date_ticks([total, *panels], [True] + [i + columns >= len(panels) for i in range(len(panels))])

    # widths in inches: the widest y tick label of any panel sets the room left of every panel
    tick_room = max(tick_label_width(ax) for ax in [total, *panels]) + TICK_BAND
    left = YLABEL_BAND + tick_room
    gap = 0.3 + tick_room
    panel_width = (WIDTH_IN - left - RIGHT_EDGE - (columns - 1) * gap) / columns
    _place(fig, total, left, total_top, WIDTH_IN - left - RIGHT_EDGE, TOTAL_HEIGHT)
    for i, ax in enumerate(panels):
        _place(fig, ax, left + (i % columns) * (panel_width + gap), row_tops[i // columns], panel_width, ROW_HEIGHT)
    for ax in [total, *panels]:
        value_ticks(ax, grid=True)
    _caption_text(fig, left, caption_top, lines)
    return fig


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
    summed: HistorySums | None = None,
) -> bytes:
    """PNG of one product class's parents: class total on top, the `top_parents` largest below.

    history: leaf or parent rows with `product, site, period_start, quantity`
    (lifecycle or cleaned history; summed here to product x site; rows of
    parents without a forecast in `parent_forecast` are ignored, so the whole
    table may be passed). parent_forecast: `product, site, period_start,
    forecast` (and `product_class`, filtered to `product_class` when present).
    `history_periods` limits the history drawn to the last so many periods
    before the cycle date (None = all). The parents not drawn are listed in the
    caption, largest first. summed: `chart_data.history_sums` of this history
    and window when the caller has it (the share chart uses the same).
    """
    fig = parent_chart_figure(
        history, parent_forecast, product_class=product_class, cycle_date=cycle_date, period=period,
        top_parents=top_parents, columns=columns, history_periods=history_periods, summed=summed,
    )
    return figure_png(fig)


# ----------------------------------------------------------------- 2. customer shares
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
    summed: HistorySums | None = None,
) -> Figure:
    """The figure behind `share_chart` (see there)."""
    cycle = pd.Timestamp(cycle_date)
    title = f"Product class {product_class}: customer shares of the largest parents, cycle {cycle:%Y-%m-%d}"
    summed = summed if summed is not None else history_sums(history, cycle, period, history_periods)
    data = share_chart_data(history, in_class(target, product_class), shares, cycle, summed, top_parents)
    if data is None:
        return _empty_figure(title, f"no parent of class {product_class} has a reinitialized target in this cycle")
    ranked, hist_shares, targets, last_start, window_start = data
    shown = ranked.head(max(int(top_parents), 0))
    hidden = ranked.iloc[len(shown):]
    horizon_end = shift_periods(last_start, 1, period)

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
    # heights in inches, top down: title, the panels (date labels under the lowest only: they share x), caption
    tops = SUPTITLE_BAND + PANEL_HEAD + np.arange(rows) * (PANEL_HEAD + SHARE_HEIGHT + BARE_FOOT)
    caption_top = SUPTITLE_BAND + rows * (PANEL_HEAD + SHARE_HEIGHT + BARE_FOOT) - BARE_FOOT + DATE_BAND + 0.1
    height = caption_top + LINE_IN * len(lines) + 0.1
    fig = Figure(figsize=(WIDTH_IN, height), dpi=DPI)
    fig.suptitle(title, fontsize=13, fontweight="bold", y=1.0 - 0.12 / height, va="top")
    legend_texts = []
    hist_by = {k: g for k, g in hist_shares.groupby(PARENT, observed=True)}
    first_ax = None
    for i, row in enumerate(shown.itertuples(index=False)):
        key = (row.product, row.site)
        ax = fig.add_axes((0, 0, 1, 1), sharex=first_ax)
        first_ax = first_ax or ax
        empty = hist_shares.iloc[:0]
        bands, top, n_rest = stack_for_parent(hist_by.get(key, empty), targets[row.pos], top_children)
        _mark_horizon(ax, cycle, horizon_end, label=i == 0)
        # one full-width bar per period (a stepped stacked area): a period stands for its whole bucket,
        # and a lone period of an intermittent series stays visible
        left = _x(bands.index)
        width = _x(_next_starts(bands.index, period)) - left
        at_cycle = bands[bands.index >= cycle].iloc[0] if (bands.index >= cycle).any() else None
        bottom = np.zeros(len(bands))
        drawn = ~bands.isna().all(axis=1).to_numpy()
        corners = []  # every bar's corners: the data limits `add_collection(autolim=True)` would find, found once
        for j, column in enumerate(bands.columns):
            values = bands[column].fillna(0.0).to_numpy(dtype=float)
            label = f"{OTHER} ({n_rest} customer{'s' if n_rest > 1 else ''})" if column == OTHER else str(column)
            if at_cycle is not None:
                label += f"  {at_cycle[column]:.1%}"
            color = OTHER_COLOR if column == OTHER else CHILD_COLORS[j % len(CHILD_COLORS)]
            ax.add_collection(
                _bars(left[drawn], width[drawn], bottom[drawn], values[drawn], color=color, label=label),
                autolim=False,
            )
            corners += [left[drawn], left[drawn] + width[drawn], bottom[drawn], bottom[drawn] + values[drawn]]
            bottom = bottom + values
        if corners and len(corners[0]):
            xs, ys = np.concatenate(corners[0::4] + corners[1::4]), np.concatenate(corners[2::4] + corners[3::4])
            ax.update_datalim([[xs.min(), ys.min()], [xs.max(), ys.max()]])
        if row.pos in window_start:
            _vline(ax, _x(window_start[row.pos]), color=CYCLE_COLOR, ls=":", lw=1.0, zorder=3,
                   label="share window start" if i == 0 else None)
        ax.autoscale_view()
        ax.set_ylim(0, 1)
        ax.yaxis.set_major_formatter(PercentFormatter(1.0, decimals=0))
        ax.set_ylabel("share of parent")
        ax.set_title(
            f"{_parent_label(row.product, row.site)}: {len(top) + n_rest} customers", fontsize=10, loc="left", y=1.0
        )
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
        legend_texts += [labels[k] for k in order] + (["share at cycle date"] if at_cycle is not None else [])
    panels = fig.axes
    date_ticks(panels, [i == rows - 1 for i in range(rows)])
    # widths in inches: room for "100%" and the y label on the left, for the widest legend on the right (handle
    # 2 em, pads 1.6 em at 8 pt, and the 1 % of the axes' width it stands off)
    left = YLABEL_BAND + _text_width("100%", 10.0) + TICK_BAND
    legend = max(_text_width(t, 8.0) for t in legend_texts) + 3.6 * 8 / 72
    width = (WIDTH_IN - left - legend - RIGHT_EDGE) / 1.01
    for ax, top in zip(panels, tops, strict=True):
        _place(fig, ax, left, top, width, SHARE_HEIGHT)
        value_ticks(ax, grid=False)
    _caption_text(fig, left, caption_top, lines)
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
    summed: HistorySums | None = None,
) -> bytes:
    """PNG of the customers' shares of the `top_parents` largest parents of one class, stacked.

    history: `product, site, customer, period_start, quantity` (lifecycle
    history; optional `shortage`). target: the class's `reinitialized_target`
    rows (`product, site, customer, period_start, share, target`; filtered to
    `product_class` when it has that column). shares (optional): the class's
    `share_tables` rows; when given, each panel marks the start of its parent's
    share window (`window_start`). Parents are ranked by history volume.
    summed: `chart_data.history_sums` of this history and window, when given.
    """
    fig = share_chart_figure(
        history, target, product_class=product_class, cycle_date=cycle_date, period=period, top_parents=top_parents,
        top_children=top_children, history_periods=history_periods, shares=shares, summed=summed,
    )
    return figure_png(fig)
