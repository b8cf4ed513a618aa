"""Pictures and a static HTML page of one cycle: what a planner looks at after the run.

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
  relative file name in the same folder) with the checks (failed first: ERROR,
  then WARN), the classes, the biggest share movers, the rejected rows and the
  charts. Every text from the data is escaped with `html.escape`.

Rendering is deterministic: matplotlib's Agg canvas on a `Figure` (no pyplot,
no GUI, no global state), fixed size and dpi, matplotlib's bundled font, and no
software tag in the PNG, so the same frames give the same bytes. Each chart has
a `*_figure` function returning the figure, so tests read the plotted data
back from the artists.
"""

from __future__ import annotations

import html
import io
import math
import re
import textwrap
import urllib.parse
from collections.abc import Mapping, Sequence

import numpy as np
import pandas as pd
from matplotlib import dates as mdates
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.collections import PolyCollection
from matplotlib.figure import Figure
from matplotlib.ticker import FuncFormatter, PercentFormatter

from pipelines.calendar import ordinal_to_start, period_ordinal, shift_periods
from pipelines.keys import LEAF, PARENT

DPI = 100
WIDTH_IN = 11.0
HISTORY_COLOR = "#1f4e79"
FORECAST_COLOR = "#d9731a"
HORIZON_SHADE = "#eeeeee"
CYCLE_COLOR = "#333333"
OTHER_COLOR = "#bdbdbd"
# the tab10 palette without its grey, which is kept for "other"
CHILD_COLORS = ("#1f77b4", "#ff7f0e", "#2ca02c", "#d62728", "#9467bd", "#8c564b", "#e377c2", "#bcbd22", "#17becf")
CAPTION_WIDTH = 155  # characters per caption line at 8 pt over the figure's width
CAPTION_LINES = 9
OTHER = "other"

# A check is (asset, check, passed, severity, description[, first_rows[, what_to_do]]); severity "ERROR" or
# "WARN"; first_rows a markdown table of its first failing rows, what_to_do the advice for a failure.
Check = tuple
MOVER_COLUMNS = ["product_class", "product", "site", "customer", "share_previous", "share_current", "change_pp"]


# ----------------------------------------------------------------- shared chart pieces
def figure_png(fig: Figure) -> bytes:
    """The figure as PNG bytes (Agg canvas, no software tag, so bytes depend only on the figure)."""
    FigureCanvasAgg(fig)
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=DPI, metadata={"Software": None})
    return buffer.getvalue()


def chart_file_name(kind: str, product_class: str, cycle_date) -> str:
    """A file name safe on any file system, e.g. `parents_consumables_2026-11-30.png`."""
    safe = re.sub(r"[^A-Za-z0-9_-]+", "-", str(product_class)).strip("-") or "class"
    return f"{kind}_{safe}_{pd.Timestamp(cycle_date):%Y-%m-%d}.png"


def _rank_parents(history: pd.DataFrame, forecast: pd.DataFrame, parents: pd.DataFrame) -> pd.DataFrame:
    """Parents by history volume, then forecast volume, then key (a stable, deterministic order)."""
    hist = history.groupby(PARENT, observed=True)["quantity"].sum().rename("history_volume")
    fc = forecast.groupby(PARENT, observed=True)["forecast"].sum().rename("forecast_volume") if len(forecast) else None
    ranked = parents.join(hist, on=PARENT)
    ranked = ranked.join(fc, on=PARENT) if fc is not None else ranked.assign(forecast_volume=0.0)
    ranked[["history_volume", "forecast_volume"]] = ranked[["history_volume", "forecast_volume"]].fillna(0.0)
    ranked = ranked.sort_values(["history_volume", "forecast_volume", "product", "site"], ascending=[False, False, True, True])
    return ranked.reset_index(drop=True)


def _in_class(frame: pd.DataFrame, product_class: str) -> pd.DataFrame:
    if "product_class" in frame.columns:
        return frame[frame["product_class"] == product_class]
    return frame


def _history_of(history: pd.DataFrame, parents: pd.DataFrame, cycle: pd.Timestamp, period: str, history_periods: int | None) -> pd.DataFrame:
    """History rows of these parents before the cycle date, the last `history_periods` periods only when given."""
    hist = history.merge(parents[PARENT].drop_duplicates(), on=PARENT, how="inner")
    keep = hist["period_start"] < cycle
    if history_periods:
        keep &= hist["period_start"] >= shift_periods(cycle, -int(history_periods), period)
    return hist[keep]


def _next_starts(starts: pd.DatetimeIndex, period: str) -> pd.DatetimeIndex:
    """The start of the period after each period start."""
    return ordinal_to_start(period_ordinal(starts, period) + 1, period)


def _bars(left: np.ndarray, width: np.ndarray, bottom: np.ndarray, height: np.ndarray, **style) -> PolyCollection:
    """Rectangles [left, left + width] x [bottom, bottom + height] as one artist (thousands of bars draw in one call)."""
    right, top = left + width, bottom + height
    corners = np.stack([np.stack([left, bottom], 1), np.stack([right, bottom], 1), np.stack([right, top], 1), np.stack([left, top], 1)], 1)
    return PolyCollection(corners, linewidths=0, antialiaseds=False, zorder=2, **style)


def _parent_label(product, site) -> str:
    return f"{product} x {site}"


def _caption(text: str, names: Sequence[str] = (), lead: str = "") -> list[str]:
    """Caption lines: `text`, then `lead` and the names, cut at a name with "... and N more" past CAPTION_LINES."""
    lines = textwrap.wrap(text, CAPTION_WIDTH)
    if not names:
        return lines
    budget = (CAPTION_LINES - len(lines)) * CAPTION_WIDTH - len(lead)
    kept: list[str] = []
    used = 0
    for i, name in enumerate(names):
        rest = len(names) - i - 1
        tail = f" ... and {rest} more" if rest else ""
        if kept and used + 2 + len(name) + len(tail) > budget:
            break
        used += len(name) + (2 if kept else 0)
        kept.append(name)
    more = len(names) - len(kept)
    listed = lead + ", ".join(kept) + (f" ... and {more} more." if more else ".")
    return lines + textwrap.wrap(listed, CAPTION_WIDTH)


def _mark_horizon(ax, cycle: pd.Timestamp, end: pd.Timestamp | None, label: bool) -> None:
    """Shade the horizon, draw the cycle date; with `label`, name it in the legend and write history / horizon on the axes."""
    if end is not None and end > cycle:
        ax.axvspan(cycle, end, color=HORIZON_SHADE, zorder=0, lw=0)
    ax.axvline(cycle, color=CYCLE_COLOR, ls="--", lw=1.0, zorder=3, label=f"cycle date {cycle:%Y-%m-%d}" if label else None)
    if label:
        where = ax.get_xaxis_transform()  # x in dates, y in axes fraction
        ax.text(cycle, 1.01, "history  ", ha="right", va="bottom", fontsize=8, transform=where)
        ax.text(cycle, 1.01, "  horizon", ha="left", va="bottom", fontsize=8, transform=where)


def _date_axis(ax) -> None:
    locator = mdates.AutoDateLocator(minticks=4, maxticks=9)
    ax.xaxis.set_major_locator(locator)
    ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator))


def _quantity_axis(ax, unit: str) -> None:
    ax.yaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:,.0f}"))
    ax.set_ylim(bottom=0)
    ax.set_ylabel(unit)
    ax.grid(axis="y", color="#dddddd", lw=0.6)


def _empty_figure(title: str, message: str) -> Figure:
    fig = Figure(figsize=(WIDTH_IN, 2.0), dpi=DPI)
    fig.suptitle(title, fontsize=12)
    fig.text(0.5, 0.45, message, ha="center", va="center", fontsize=10)
    return fig


def _caption_axes(fig: Figure, spec, lines: list[str]) -> None:
    ax = fig.add_subplot(spec)
    ax.axis("off")
    ax.text(0.0, 1.0, "\n".join(lines), ha="left", va="top", fontsize=8, transform=ax.transAxes, color="#333333")


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
    fc = fc.groupby(PARENT + ["period_start"], observed=True, as_index=False)["forecast"].sum()
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
        f"each panel has its own scale. History: lifecycle history summed to product x site. Forecast: parent_forecast. "
        f"Shaded: the horizon."
    )
    names = [_parent_label(p, s) for p, s in zip(hidden["product"], hidden["site"])]
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
            ax.plot(f["period_start"], f["forecast"].to_numpy(), color=FORECAST_COLOR, lw=1.8, label="forecast")
        part = row.history_volume / class_volume if class_volume > 0 else float("nan")
        share_text = "" if math.isnan(part) else f"  ({part:.0%} of class history)"
        ax.set_title(f"{_parent_label(row.product, row.site)}{share_text}", fontsize=9, loc="left")
        _quantity_axis(ax, unit if i % columns == 0 else "")
        _date_axis(ax)
    _caption_axes(fig, grid[rows + 1, :], lines)
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
        flagged = leaf[PARENT + ["period_start"]].merge(short, how="left", on=PARENT + ["period_start"], indicator=True)["_merge"]
        share = share.where(~(flagged == "both").to_numpy())
    return leaf[LEAF + ["period_start"]].assign(share=share.to_numpy())


def _stack_for_parent(hist_shares: pd.DataFrame, target: pd.DataFrame, top_children: int) -> tuple[pd.DataFrame, list[str], int]:
    """(periods x bands) shares of one parent, bands = the largest customers then `other`; and the count in other."""
    both = pd.concat([hist_shares[["customer", "period_start", "share"]], target[["customer", "period_start", "share"]]])
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
        window_start = {(p, s): pd.Timestamp(w) for p, s, w, u in zip(first["product"], first["site"], first["window_start"], first["window_used"]) if u > 0}

    caption = (
        f"Each panel: one parent's customers, each band a customer's share of the parent in each period; before the "
        f"cycle date from history (customer quantity / parent quantity; blank where the parent had no volume or a "
        f"recorded shortage), after it the period shares of the reinitialized target. Up to {top_children} customers "
        f"by mean share per parent; the rest summed as '{OTHER}'. Parents drawn: the {len(shown)} largest of "
        f"{len(ranked)} by history volume."
    )
    if shares is not None:
        caption += " Dotted line: start of the window the shares were computed over."
    names = [_parent_label(p, s) for p, s in zip(hidden["product"], hidden["site"])]
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
            ax.add_collection(_bars(left[drawn], width[drawn], bottom[drawn], values[drawn], color=color, label=label), autolim=True)
            bottom = bottom + values
        if key in window_start:
            ax.axvline(window_start[key], color=CYCLE_COLOR, ls=":", lw=1.0, zorder=3, label="share window start" if i == 0 else None)
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
        ax.legend([handles[k] for k in order], [labels[k] for k in order], loc="center left", bbox_to_anchor=(1.01, 0.5),
                  fontsize=8, frameon=False, title="share at cycle date" if at_cycle is not None else None, title_fontsize=8)
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


# ----------------------------------------------------------------- 3. the HTML page
def class_summary(share_tables: pd.DataFrame, parent_forecast: pd.DataFrame | None = None, strategy_choice: pd.DataFrame | None = None) -> pd.DataFrame:
    """One row per product class: parents, children, method, windows, fallbacks, lifecycle rules and strategy.

    Strategy from `strategy_choice` (`product_class, strategy, leaf_wmape,
    runner_up, margin`) when given, else the `strategy` column of
    `parent_forecast` (the distinct values of the class).
    """
    rows = []
    for name, group in share_tables.groupby("product_class", sort=True):
        parents = group.drop_duplicates(PARENT)
        fallback = parents["fallback"].value_counts()
        rules = group.loc[group["lifecycle_rule"] != "none", "lifecycle_rule"].value_counts().sort_index()
        used = sorted(int(w) for w in parents["window_used"].unique())
        strategy = ""
        if strategy_choice is not None and len(strategy_choice):
            mine = strategy_choice[strategy_choice["product_class"] == name]
            if len(mine):
                c = mine.iloc[0]
                strategy = str(c["strategy"])
                if pd.notna(c.get("leaf_wmape")):
                    strategy += f" (leaf WMAPE {c['leaf_wmape']:.3f}"
                    if c.get("runner_up") and pd.notna(c.get("margin")):
                        strategy += f", margin {c['margin']:+.4f} over {c['runner_up']}"
                    strategy += ")"
        elif parent_forecast is not None and "strategy" in parent_forecast.columns:
            mine = parent_forecast.loc[parent_forecast["product_class"] == name, "strategy"].dropna()
            strategy = ", ".join(sorted(mine.astype(str).unique()))
        rows.append(
            {
                "product_class": name,
                "parents": len(parents),
                "children": len(group),
                "method": ", ".join(sorted(group["method"].astype(str).unique())),
                "window": ", ".join(str(int(w)) for w in sorted(group["window"].unique())),
                "windows_used": ", ".join("even split" if w == 0 else str(w) for w in used),
                "fallback_longer_window": int(fallback.get("longer_window", 0)),
                "fallback_even": int(fallback.get("even", 0)),
                "lifecycle_rules": ", ".join(f"{r} {n}" for r, n in rules.items()) or "none",
                "strategy": strategy,
            }
        )
    return pd.DataFrame(rows)


_CSS = """
body { font-family: system-ui, -apple-system, "Segoe UI", Roboto, Arial, sans-serif; margin: 1.5rem auto; max-width: 1200px;
       color: #222; line-height: 1.4; padding: 0 1rem; }
h1 { font-size: 1.5rem; margin-bottom: .2rem; } h2 { font-size: 1.2rem; margin-top: 2rem; border-bottom: 1px solid #ccc; }
h3 { font-size: 1.05rem; } .meta { color: #555; margin-top: 0; }
table { border-collapse: collapse; margin: .5rem 0 1rem; font-size: .9rem; }
th, td { border: 1px solid #d0d0d0; padding: .25rem .5rem; text-align: left; vertical-align: top; }
th { background: #f3f3f3; } td.num { text-align: right; font-variant-numeric: tabular-nums; }
td.desc { color: #444; font-size: .85rem; max-width: 40rem; }
tr.failed-error td { background: #fde2e1; } tr.failed-warn td { background: #fff4d6; }
.status { font-weight: bold; white-space: nowrap; } .banner { padding: .6rem 1rem; border-radius: 4px; font-weight: bold; }
.banner.error { background: #f8c9c6; border: 1px solid #c62828; } .banner.warn { background: #ffe9a8; border: 1px solid #b28704; }
.banner.ok { background: #d6efd6; border: 1px solid #2e7d32; }
figure { margin: 1rem 0; } figure img { max-width: 100%; border: 1px solid #ddd; } figcaption { color: #555; font-size: .85rem; }
.empty { color: #666; font-style: italic; }
"""


def _e(value) -> str:
    """Escaped text of a cell: blanks (None, NaN, NaT) as ''."""
    if value is None or (not isinstance(value, str) and pd.api.types.is_scalar(value) and pd.isna(value)):
        return ""
    if isinstance(value, pd.Timestamp):
        return html.escape(f"{value:%Y-%m-%d}")
    return html.escape(str(value))


def _html_table(headers: Sequence[str], rows: Sequence[Sequence[str]], row_classes: Sequence[str] | None = None, numeric: Sequence[int] = ()) -> str:
    """A table of already escaped cells (headers are escaped here)."""
    head = "".join(f"<th>{html.escape(h)}</th>" for h in headers)
    body = []
    for i, row in enumerate(rows):
        cls = f' class="{row_classes[i]}"' if row_classes and row_classes[i] else ""
        cells = "".join(f'<td class="num">{c}</td>' if j in numeric else f"<td>{c}</td>" for j, c in enumerate(row))
        body.append(f"<tr{cls}>{cells}</tr>")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def _frame_table(frame: pd.DataFrame, numeric_format: Mapping[str, str] | None = None) -> str:
    numeric_format = numeric_format or {}
    rows = []
    for record in frame.itertuples(index=False):
        cells = []
        for column, value in zip(frame.columns, record):
            fmt = numeric_format.get(column)
            cells.append(_e(format(value, fmt) if fmt and pd.notna(value) else value))
        rows.append(cells)
    numeric = [i for i, c in enumerate(frame.columns) if pd.api.types.is_numeric_dtype(frame[c]) and not pd.api.types.is_bool_dtype(frame[c])]
    return _html_table([str(c) for c in frame.columns], rows, numeric=numeric)


def order_checks(checks: Sequence[Check]) -> list[Check]:
    """Failed ERROR checks first, then failed WARN (and any other severity), then passed; given order within each."""

    def rank(check: Check) -> int:
        passed, severity = check[2], check[3]
        if passed:
            return 2
        return 0 if str(severity).upper() == "ERROR" else 1

    return sorted(checks, key=rank)


def _checks_section(checks: Sequence[Check]) -> str:
    ordered = order_checks(checks)
    failed_error = sum(1 for c in ordered if not c[2] and str(c[3]).upper() == "ERROR")
    failed_other = sum(1 for c in ordered if not c[2]) - failed_error
    if failed_error:
        banner = f'<p class="banner error">{failed_error} blocking (ERROR) check(s) failed'
        banner += f" and {failed_other} warning(s)" if failed_other else ""
        banner += ": everything downstream of the failed asset is not current. See the first rows below.</p>"
    elif failed_other:
        banner = f'<p class="banner warn">{failed_other} warning (WARN) check(s) failed; the cycle went on. See the first rows below.</p>'
    elif ordered:
        banner = f'<p class="banner ok">All {len(ordered)} checks passed.</p>'
    else:
        banner = '<p class="banner warn">No check results were given for this cycle.</p>'
    rows, classes = [], []
    for asset, name, passed, severity, description, *_ in ordered:
        sev = str(severity).upper()
        status = "passed" if passed else "FAILED"
        classes.append("" if passed else ("failed-error" if sev == "ERROR" else "failed-warn"))
        rows.append([f'<span class="status">{status}</span>', _e(sev), _e(asset), _e(name), f'<span class="desc">{_e(description)}</span>'])
    table = _html_table(["status", "severity", "asset", "check", "what it proves"], rows, classes) if rows else ""
    counts = f"<p>{len(ordered) - failed_error - failed_other} passed, {failed_error + failed_other} failed.</p>"
    return f'<section id="checks"><h2>Checks</h2>{banner}{counts}{table}{_failures_section(ordered)}</section>'


def markdown_rows(text: str) -> tuple[list[str], list[list[str]]]:
    """Header and rows of a pipe table (as `DataFrame.to_markdown` writes it); ([], []) for anything else."""
    lines = [line.strip() for line in str(text or "").splitlines() if line.strip().startswith("|")]
    if len(lines) < 2:
        return [], []

    def cells(line: str) -> list[str]:
        return [c.strip() for c in line.strip().strip("|").split("|")]

    header = cells(lines[0])
    body = [cells(line) for line in lines[2:]]
    return header, [row + [""] * (len(header) - len(row)) for row in body]


def _failures_section(ordered: Sequence[Check]) -> str:
    """Each failed check with its first failing rows (file, row, keys, column, value) and what to do."""
    parts = []
    for check in ordered:
        if check[2] or len(check) < 6:
            continue
        asset, name, _, severity, _, first_rows, *rest = check
        advice = rest[0] if rest else ""
        header, body = markdown_rows(first_rows)
        table = _html_table(header, [[_e(c) for c in row] for row in body]) if header else (
            '<p class="empty">The check gave no rows.</p>'
        )
        parts.append(
            f'<div class="failure"><h3>{_e(str(severity).upper())} {_e(asset)}: {_e(name)}</h3>{table}'
            + (f'<p class="advice">What to do: {_e(advice)}</p>' if advice else "")
            + "</div>"
        )
    return f'<h3 id="failed-rows">First failing rows</h3>{"".join(parts)}' if parts else ""


def _movers_section(movers: pd.DataFrame | None, top_movers: int) -> str:
    head = '<section id="movers"><h2>Biggest share movers</h2>'
    if movers is None or movers.empty:
        return head + '<p class="empty">No previous cycle: nothing to compare the shares with.</p></section>'
    missing = [c for c in MOVER_COLUMNS if c not in movers.columns]
    if missing:
        return head + f'<p class="empty">The movers table lacks the columns {_e(", ".join(missing))}.</p></section>'
    frame = movers[MOVER_COLUMNS].copy()
    frame = frame.iloc[np.argsort(-frame["change_pp"].abs().to_numpy(), kind="stable")].head(top_movers)
    rows = [
        [_e(r.product_class), _e(r.product), _e(r.site), _e(r.customer), _e(f"{100 * r.share_previous:.2f} %"),
         _e(f"{100 * r.share_current:.2f} %"), _e(f"{r.change_pp:+.2f}")]
        for r in frame.itertuples(index=False)
    ]
    table = _html_table(["class", "product", "site", "customer", "share previous", "share current", "change (points)"], rows, numeric=[4, 5, 6])
    return head + f"<p>The {len(frame)} largest changes of base share against the previous cycle, of {len(movers)}.</p>{table}</section>"


def _rejected_section(rejected: pd.DataFrame | None, sample_rows: int) -> str:
    head = '<section id="rejected"><h2>Rejected rows</h2>'
    if rejected is None:
        return head + '<p class="empty">No rejected rows table was given.</p></section>'
    if rejected.empty:
        return head + "<p>No history line was rejected.</p></section>"
    counts = rejected["reason"].value_counts().rename_axis("reason").rename("rows").reset_index()
    counts = counts.sort_values(["rows", "reason"], ascending=[False, True])
    sort = [c for c in ("source_file", "source_row") if c in rejected.columns]
    sample = (rejected.sort_values(sort) if sort else rejected).head(sample_rows)
    return (
        head + f"<p>{len(rejected):,} history lines were not used. By reason:</p>{_frame_table(counts)}"
        f"<h3>Sample ({len(sample)} of {len(rejected):,})</h3>{_frame_table(sample)}</section>"
    )


def _charts_section(charts: Mapping[str, Sequence[str]] | None) -> str:
    head = '<section id="charts"><h2>Charts</h2>'
    if not charts:
        return head + '<p class="empty">No charts were made for this cycle.</p></section>'
    parts = [head]
    for name in sorted(charts):
        parts.append(f"<h3>Product class {_e(name)}</h3>")
        for file_name in charts[name]:
            src = html.escape(urllib.parse.quote(str(file_name)), quote=True)
            parts.append(f'<figure><img src="{src}" alt="{_e(file_name)}"><figcaption>{_e(file_name)}</figcaption></figure>')
    return "".join(parts) + "</section>"


def cycle_report_html(
    *,
    cycle_date,
    share_tables: pd.DataFrame,
    checks: Sequence[Check],
    parent_forecast: pd.DataFrame | None = None,
    strategy_choice: pd.DataFrame | None = None,
    rejected_rows: pd.DataFrame | None = None,
    movers: pd.DataFrame | None = None,
    charts: Mapping[str, Sequence[str]] | None = None,
    calendar: pd.DataFrame | None = None,
    top_movers: int = 20,
    sample_rows: int = 10,
    title: str = "apportion cycle report",
) -> str:
    """A static, self-contained HTML page of one cycle.

    Sections, in order: checks (failed ERROR, failed WARN, then passed, with a
    banner), product classes (`class_summary`), biggest share movers (`movers`
    with MOVER_COLUMNS, `change_pp` in percentage points; None or empty = "no
    previous cycle"), rejected rows (counts by reason and the first
    `sample_rows` by file and row), charts (`charts`: product class -> image
    file names in the page's folder). `calendar` is the one-row
    `cycle_calendar` (period kind, horizon, history range) when given.
    """
    cycle = pd.Timestamp(cycle_date)
    meta = f"Cycle date {cycle:%Y-%m-%d}"
    if calendar is not None and len(calendar):
        c = calendar.iloc[0]
        meta += f"; {int(c['horizon'])} {c['period']}s ahead"
        if pd.notna(c.get("history_start")):
            meta += f"; history from {pd.Timestamp(c['history_start']):%Y-%m-%d} ({int(c['history_periods'])} periods)"
    summary = class_summary(share_tables, parent_forecast, strategy_choice)
    class_rows = [
        [_e(r.product_class), _e(r.parents), _e(r.children), _e(r.method), _e(r.window), _e(r.windows_used),
         _e(r.fallback_longer_window), _e(r.fallback_even), _e(r.lifecycle_rules), _e(r.strategy)]
        for r in summary.itertuples(index=False)
    ]
    classes = _html_table(
        ["class", "parents", "children", "share method", "window", "windows used", "parents on a longer window",
         "parents split evenly", "lifecycle rules (children)", "strategy"],
        class_rows, numeric=[1, 2, 6, 7],
    ) if class_rows else '<p class="empty">The share table is empty.</p>'
    body = [
        f"<h1>{_e(title)}</h1>",
        f'<p class="meta">{_e(meta)}</p>',
        '<nav><a href="#checks">Checks</a> | <a href="#classes">Product classes</a> | <a href="#movers">Share movers</a> | '
        '<a href="#rejected">Rejected rows</a> | <a href="#charts">Charts</a></nav>',
        _checks_section(checks),
        f'<section id="classes"><h2>Product classes</h2>{classes}</section>',
        _movers_section(movers, top_movers),
        _rejected_section(rejected_rows, sample_rows),
        _charts_section(charts),
    ]
    return (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        f"<title>{_e(title)}, cycle {cycle:%Y-%m-%d}</title><style>{_CSS}</style></head>\n<body>\n"
        + "\n".join(body)
        + "\n</body></html>\n"
    )
