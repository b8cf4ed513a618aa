"""The cycle report's axes: quantity and date axes whose ticks are drawn as a few artists.

Matplotlib draws each tick of an axis as a tick object of five artists (two tick
marks, a grid line, two labels), made, laid out and drawn again at every draw.
The charts draw each axis's ticks instead as one line of tick marks, one set of
grid lines and one text per label (`tick_artists`), where and as the axis's own
tick objects would draw them: the same locator and formatter, pad, alignment,
zorder and clipping, the y label placed as the axis places it. The PNGs are the
same, pixel for pixel (tests/test_report.py). Public matplotlib API only.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from matplotlib import dates as mdates
from matplotlib import rcParams
from matplotlib.axis import Ticker
from matplotlib.collections import LineCollection
from matplotlib.lines import Line2D
from matplotlib.markers import TICKDOWN, TICKLEFT
from matplotlib.text import Text
from matplotlib.ticker import FixedLocator, FuncFormatter, NullFormatter, NullLocator
from matplotlib.transforms import IdentityTransform, blended_transform_factory

from pipelines.engines.chart_base import _MEASURE, _text_width

GRID_COLOR = "#dddddd"
GRID_WIDTH = 0.6


def date_ticks(axes: Sequence, labelled: Sequence[bool]) -> None:
    """Date ticks of axes sharing x, found once from their common limits (the ticks `AutoDateLocator` gives
    there, labelled by `ConciseDateFormatter`). Every axes gets the tick marks as one line of markers; the axes
    `labelled` also their labels, one text each, where and as the axis would draw them (`tick_artists`), so
    matplotlib makes and draws no tick objects. When the formatter has an offset to show (a short range), the
    labelled axes keep matplotlib's own ticks, which place it.
    """
    low, high = axes[0].get_xlim()
    ticks = mdates.AutoDateLocator(minticks=4, maxticks=9).tick_values(mdates.num2date(low), mdates.num2date(high))
    locator = FixedLocator(ticks)
    shown = ticks[(ticks >= low) & (ticks <= high)]
    formatter = mdates.ConciseDateFormatter(locator)
    labels = formatter.format_ticks(ticks)
    own = not formatter.get_offset()
    for ax, label in zip(axes, labelled, strict=True):
        ax.xaxis.major = Ticker()  # a locator and formatter of its own: the axes share x limits, not ticks
        if label and not own:
            ax.xaxis.set_major_locator(locator)
            ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator))
            continue
        ax.xaxis.set_major_locator(NullLocator())
        ax.xaxis.set_major_formatter(NullFormatter())
        if label:
            tick_artists(ax, "x", ticks, labels, (low, high))
            continue
        ax.plot(
            shown, np.zeros(len(shown)), ls="none", marker=TICKDOWN, ms=rcParams["xtick.major.size"],
            mew=rcParams["xtick.major.width"], color=rcParams["xtick.color"], transform=ax.get_xaxis_transform(),
            clip_on=False, label="_date ticks",
        )


def tick_artists(ax, which: str, locs, labels: Sequence[str], limits: tuple[float, float], grid: bool = False):
    """The major ticks of `ax`'s `which` axis ("x": bottom, "y": left) at `locs` labelled `labels`, as the axis's
    tick objects would draw them: those within `limits` (widened by the axis's own tolerance), a tick mark each
    (one line of markers), a grid line each (one line, clipped to the axes) when `grid`, and a label each (one
    text, at the tick's pad, in the axis's alignment), all at the axis's zorder. Returns the label texts."""
    low, high = min(limits), max(limits)
    slack = (high - low) * 1e-10
    keep = [i for i, v in enumerate(locs) if low - slack <= v <= high + slack]
    if not keep:
        return []
    name = f"{which}tick"
    size, width = rcParams[f"{name}.major.size"], rcParams[f"{name}.major.width"]
    color = rcParams[f"{name}.color"]
    label_color = color if rcParams[f"{name}.labelcolor"] == "inherit" else rcParams[f"{name}.labelcolor"]
    pad = rcParams[f"{name}.major.pad"] + size  # ticks drawn outwards
    at = np.asarray(locs, dtype=float)[keep]
    across = np.zeros(len(at))
    if which == "x":
        mark, xy = TICKDOWN, (at, across)
        where, valign, halign = ax.get_xaxis_text1_transform(pad)
        line_at, tick_at = ax.get_xaxis_transform(which="grid"), ax.get_xaxis_transform(which="tick1")
    else:
        mark, xy = TICKLEFT, (across, at)
        where, valign, halign = ax.get_yaxis_text1_transform(pad)
        line_at, tick_at = ax.get_yaxis_transform(which="grid"), ax.get_yaxis_transform(which="tick1")
    zorder = 1.5  # the axes' axis artists (`axes.axisbelow: line`)
    if grid:
        ends = np.array([0.0, 1.0])
        segments = [np.column_stack((ends, [v, v]) if which == "y" else ([v, v], ends)) for v in at]
        ax.add_artist(LineCollection(
            segments, transform=line_at, colors=GRID_COLOR, linewidths=GRID_WIDTH,
            linestyles=rcParams["grid.linestyle"], alpha=rcParams["grid.alpha"],
            capstyle=rcParams["lines.solid_capstyle"], joinstyle=rcParams["lines.solid_joinstyle"], zorder=zorder,
        ))
    ax.add_artist(Line2D(
        *xy, ls="none", marker=mark, ms=size, mew=width, color=color, markeredgecolor=color, transform=tick_at,
        clip_on=False, zorder=zorder,
    ))
    return [
        ax.add_artist(Text(
            *((v, 0) if which == "x" else (0, v)), labels[i], fontsize=rcParams[f"{name}.labelsize"],
            color=label_color, verticalalignment=valign, horizontalalignment=halign, transform=where, clip_on=False,
            zorder=zorder,
        ))
        for i, v in zip(keep, at, strict=True)
    ]


def tick_label_width(ax, points: float = 10.0) -> float:
    """Width in inches of the widest y tick label `ax` will draw (its locator over its limits, its formatter)."""
    low, high = ax.get_ylim()
    ticks = [v for v in ax.yaxis.get_major_locator().tick_values(low, high) if low <= v <= high]
    labels = ax.yaxis.get_major_formatter().format_ticks(ticks) if ticks else []
    return max((_text_width(t, points) for t in labels), default=0.0)


def quantity_axis(ax, unit: str) -> None:
    """A quantity axis from 0, its labels with thousands separators, grid lines at its ticks (`value_ticks`)."""
    ax.yaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:,.0f}"))
    ax.set_ylim(bottom=0)
    ax.set_ylabel(unit)



def value_ticks(ax, grid: bool) -> None:
    """The y axis's major ticks as a few artists instead of matplotlib's tick objects (each a tick mark, a second
    tick mark, a grid line and two labels, made and laid out again at every draw): `tick_artists` at the ticks the
    axis's locator gives over its final limits, labelled by its formatter, and the y label placed where the axis
    would put it (left of the labels' and the spine's extents by its pad). Call it once the axes is placed and
    its y limits are final; they are fixed here.
    """
    low, high = ax.get_ylim()
    ax.set_ylim(low, high)
    axis = ax.yaxis
    locs = axis.get_major_locator().tick_values(low, high)
    labels = axis.get_major_formatter().format_ticks(locs)
    axis.set_major_locator(NullLocator())
    texts = tick_artists(ax, "y", locs, labels, (low, high), grid=grid)
    extents = [t.get_window_extent(_MEASURE).x0 for t in texts] + [ax.spines["left"].get_window_extent(_MEASURE).x0]
    axis.set_label_coords(min(extents) - axis.labelpad * ax.get_figure().dpi / 72, 0.5,
                          transform=blended_transform_factory(IdentityTransform(), ax.transAxes))
