"""What every chart of the cycle report shares: size, colours, captions, axes, the PNG encoding.

Rendering is deterministic: matplotlib's Agg canvas on a `Figure` (no pyplot,
no GUI, no global state), fixed size and dpi, matplotlib's bundled font, and no
software tag in the PNG, so the same frames give the same bytes.

Layout is fixed, in inches, not found by a layout engine: the margins come from
the widths of the labels they hold, measured once (`_text_width`), and the axes
are placed with `_place`. A layout engine measures every artist's bounding box
before the draw, which cost more than the draw itself. The date ticks of the
axes sharing x are found once, and every axis's ticks are drawn as a few artists (`chart_axes`).
"""

from __future__ import annotations

import re
import struct
import textwrap
import zlib
from collections.abc import Sequence

import numpy as np
import pandas as pd
from matplotlib import dates as mdates
from matplotlib.backend_bases import RendererBase
from matplotlib.backends.backend_agg import FigureCanvasAgg, RendererAgg
from matplotlib.collections import PolyCollection
from matplotlib.figure import Figure
from matplotlib.font_manager import FontProperties
from matplotlib.ft2font import LoadFlags
from matplotlib.lines import Line2D
from matplotlib.patches import Rectangle
from matplotlib.textpath import TextToPath

from pipelines.calendar import ordinal_to_start, period_ordinal
from pipelines.keys import PARENT

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
# fixed pieces of a layout, inches
SUPTITLE_BAND = 0.5  # the figure's title above the first panel's head
PANEL_HEAD = 0.32  # a panel's title (and the history / horizon words) above its axes
DATE_BAND = 0.38  # date labels under an axes (and the offset of a short range)
BARE_FOOT = 0.14  # under an axes without date labels
YLABEL_BAND = 0.4  # figure edge, the y label at 10 pt and its pad
TICK_BAND = 0.1  # tick marks and their pad (3.5 + 3.5 pt)
RIGHT_EDGE = 0.25
LINE_IN = 0.14  # one caption line at 8 pt

# ----------------------------------------------------------------- shared chart pieces
class _TextPaths(TextToPath):
    """`TextToPath` keeping the outline of each short text it made (tick labels, legend entries, titles repeat
    across the panels and the charts of a run) and of each glyph (`TextToPath.get_text_path`'s own steps, its
    glyphs' outlines kept over texts, not loaded again for every character): the same vertices and codes."""

    LONGEST = 80  # characters: longer texts (captions) are laid out each time, from the glyphs kept
    KEPT = 4096

    def __init__(self):
        super().__init__()
        self._kept: dict = {}
        self._glyphs: dict = {}  # (font file, glyph index) -> the glyph's outline (vertices, codes) at FONT_SCALE

    def get_text_path(self, prop, s, ismath=False, **kwargs):
        if ismath or any(v is not None for v in kwargs.values()):
            return super().get_text_path(prop, s, ismath=ismath, **kwargs)
        if len(s) > self.LONGEST:
            return self._outline(prop, s)
        key = (s, prop.copy())
        path = self._kept.get(key)
        if path is None:
            if len(self._kept) >= self.KEPT:
                self._kept.clear()
            path = self._kept[key] = self._outline(prop, s)
        return path

    def _outline(self, prop, s):
        """`TextToPath.get_text_path(prop, s)` for plain text: each glyph's outline placed where the layout puts
        it (`verts * 1.0 + [x, y]`, as there, here over all glyphs at once), a glyph's outline loaded only when not
        kept (kept by font file and glyph index)."""
        font = self._get_font(prop)
        glyphs, places = [], []
        for item in font._layout(s, LoadFlags.NO_HINTING):
            key = (item.ft_object.fname, item.glyph_index)
            glyph = self._glyphs.get(key)
            if glyph is None:
                item.ft_object.load_glyph(item.glyph_index, flags=LoadFlags.NO_HINTING)
                glyph = self._glyphs[key] = item.ft_object.get_path()
            glyphs.append(glyph)
            places.append((item.x, item.y))
        if not glyphs:
            return np.empty((0, 2)), []
        verts = np.concatenate([g[0] for g in glyphs])
        at = np.repeat(np.array(places, dtype=float), [len(g[0]) for g in glyphs], axis=0)
        return verts * 1.0 + at, np.concatenate([g[1] for g in glyphs])


_TEXT_PATHS = _TextPaths()
_TEXT_EXTENTS: dict = {}  # (text, font properties, ismath, dpi) -> (width, height, descent) in pixels, any renderer


class _OutlineTextRenderer(RendererAgg):
    """Agg drawing each line of text as one filled path of its glyphs' outlines (`RendererBase.draw_text`, as
    vector backends draw text), each distinct glyph's outline loaded once per line, instead of rendering and
    blending a bitmap per glyph: half the time on these text-heavy charts; same font, size and place, unhinted.
    A short text's outline (`_TextPaths`) and every text's extent are made once per process, not once per
    figure: the same numbers, from the same font at the same dpi.
    """

    def __init__(self, width, height, dpi):
        super().__init__(width, height, dpi)
        self._text2path = _TEXT_PATHS

    def draw_text(self, gc, x, y, s, prop, angle, ismath=False, mtext=None):
        RendererBase.draw_text(self, gc, x, y, s, prop, angle, ismath, mtext)

    def get_text_width_height_descent(self, s, prop, ismath):
        key = (s, prop.copy(), ismath, self.dpi)
        extent = _TEXT_EXTENTS.get(key)
        if extent is None:
            if len(_TEXT_EXTENTS) >= _TextPaths.KEPT:
                _TEXT_EXTENTS.clear()
            extent = _TEXT_EXTENTS[key] = super().get_text_width_height_descent(s, prop, ismath)
        return extent


class _Canvas(FigureCanvasAgg):
    """The Agg canvas with `_OutlineTextRenderer`."""

    def get_renderer(self):
        w, h = self.get_width_height(physical=True)
        renderer = getattr(self, "renderer", None)
        if not isinstance(renderer, _OutlineTextRenderer) or (renderer.width, renderer.height) != (w, h):
            self.renderer = _OutlineTextRenderer(w, h, self.figure.dpi)
        return self.renderer


def figure_png(fig: Figure) -> bytes:
    """The figure as PNG bytes: one draw on the Agg canvas (text as outlines, `_OutlineTextRenderer`), its RGBA
    pixels written by `png_bytes`."""
    canvas = _Canvas(fig)
    canvas.draw()
    return png_bytes(np.asarray(canvas.buffer_rgba()), fig.dpi)


PNG_LEVEL = 3  # zlib level: smaller and faster than the default 6 on these charts
PNG_BLOCK = 64 * 1024  # bytes of rows handed to zlib at a time


def png_bytes(rgba: np.ndarray, dpi: float) -> bytes:
    """(height, width, 4) uint8 pixels as a PNG (8-bit RGBA, no interlace): the header, the resolution (`pHYs`, as
    matplotlib's `savefig` writes it), the rows unfiltered (filter type 0) in one zlib stream, the end. Pillow's
    encoder, which `savefig` calls, tries the five row filters on every row and keeps the best; on these charts
    (flat colours, long runs) the unfiltered rows compress smaller and in half the time, to the same pixels. No
    text chunk (no software tag): the bytes depend on the pixels only.
    """
    height, width, channels = rgba.shape
    if channels != 4 or rgba.dtype != np.uint8:
        raise ValueError(f"png_bytes takes (height, width, 4) uint8 pixels, got {rgba.shape} {rgba.dtype}")
    pixels = rgba.reshape(height, width * 4)
    # the rows, each its filter byte (0) then its pixels, go to zlib a block at a time: no copy of the whole
    # image (fresh pages cost more than the copy); zlib's stream does not depend on how its input is cut
    block = np.zeros((max(1, PNG_BLOCK // (width * 4 + 1)), width * 4 + 1), dtype=np.uint8)
    stream = zlib.compressobj(PNG_LEVEL)
    data = []
    for start in range(0, height, len(block)):
        rows = pixels[start:start + len(block)]
        block[: len(rows), 1:] = rows
        data.append(stream.compress(block[: len(rows)].data))
    data.append(stream.flush())
    per_metre = int(dpi / 0.0254 + 0.5)

    def chunk(kind: bytes, body: bytes) -> bytes:
        return struct.pack(">I", len(body)) + kind + body + struct.pack(">I", zlib.crc32(kind + body))

    return b"".join([
        b"\x89PNG\r\n\x1a\n",
        chunk(b"IHDR", struct.pack(">IIBBBBB", width, height, 8, 6, 0, 0, 0)),
        chunk(b"pHYs", struct.pack(">IIB", per_metre, per_metre, 1)),
        chunk(b"IDAT", b"".join(data)),
        chunk(b"IEND", b""),
    ])


def chart_file_name(kind: str, product_class: str, cycle_date) -> str:
    """A file name safe on any file system, e.g. `parents_consumables_2026-11-30.png`."""
    safe = re.sub(r"[^A-Za-z0-9_-]+", "-", str(product_class)).strip("-") or "class"
    return f"{kind}_{safe}_{pd.Timestamp(cycle_date):%Y-%m-%d}.png"


def rank_parents(parents: pd.DataFrame, history_volume: np.ndarray, forecast_volume: np.ndarray) -> pd.DataFrame:
    """Parents by history volume, then forecast volume, then key (a stable, deterministic order); `pos` is each
    one's position in `parents`, the volumes are per position (`chart_data.sums_by_parent`)."""
    ranked = parents[PARENT].assign(history_volume=history_volume, forecast_volume=forecast_volume)
    ranked["pos"] = np.arange(len(parents))
    ranked = ranked.sort_values(
        ["history_volume", "forecast_volume", "product", "site"], ascending=[False, False, True, True]
    )
    return ranked.reset_index(drop=True)


def in_class(frame: pd.DataFrame, product_class: str) -> pd.DataFrame:
    """The rows of `product_class` where the frame has a `product_class` column, else the frame as it is."""
    if "product_class" in frame.columns:
        mine = (frame["product_class"] == product_class).to_numpy()
        return frame if mine.all() else frame[mine]
    return frame


def _next_starts(starts: pd.DatetimeIndex, period: str) -> pd.DatetimeIndex:
    """The start of the period after each period start."""
    return ordinal_to_start(period_ordinal(starts, period) + 1, period)


def _bars(left: np.ndarray, width: np.ndarray, bottom: np.ndarray, height: np.ndarray, **style) -> PolyCollection:
    """Rectangles [left, left + width] x [bottom, bottom + height] as one artist (thousands of bars draw in one
    call).
    """
    right, top = left + width, bottom + height
    corners = np.stack(
        [
            np.stack([left, bottom], 1),
            np.stack([right, bottom], 1),
            np.stack([right, top], 1),
            np.stack([left, top], 1),
        ],
        1,
    )
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
    """Shade the horizon, draw the cycle date; with `label`, name it in the legend and write history / horizon on
    the axes. Dates are drawn as matplotlib date numbers (`_x`).
    """
    if end is not None and end > cycle:
        start, stop = _x(cycle), _x(end)
        # what `axvspan` adds (x in data, y the axes' height), without its asking for the x limits again
        ax.add_patch(Rectangle((start, 0), stop - start, 1, transform=ax.get_xaxis_transform(which="grid"),
                               color=HORIZON_SHADE, zorder=0, lw=0))
    _vline(ax, _x(cycle), color=CYCLE_COLOR, ls="--", lw=1.0, zorder=3,
           label=f"cycle date {cycle:%Y-%m-%d}" if label else None)
    if label:
        where = ax.get_xaxis_transform()  # x in dates, y in axes fraction
        ax.text(_x(cycle), 1.01, "history  ", ha="right", va="bottom", fontsize=8, transform=where)
        ax.text(_x(cycle), 1.01, "  horizon", ha="left", va="bottom", fontsize=8, transform=where)


def _vline(ax, x: float, **style) -> Line2D:
    """A vertical line at `x` over the axes' height, the line `axvline` adds (its x in the data limits), without
    `axvline`'s reading of the x limits, which makes matplotlib find them again for every line. The x limits are
    found once all is drawn: the charts' plots and `autoscale_view` ask for them."""
    line = Line2D([x, x], [0, 1], transform=ax.get_xaxis_transform(which="grid"), **style)
    ax.add_line(line)
    return line


def _x(dates):
    """Dates as matplotlib date numbers (days since 1970-01-01), the x the charts draw at. Given as numbers, the axes
    get no date units, so matplotlib does not convert each rectangle of a stacked bar again at every draw.
    """
    return mdates.date2num(dates)


def _text_width(text: str, points: float) -> float:
    """Width in inches of one line of `text` at `points` in the default font, as the Agg canvas lays it out."""
    width, _, _ = _MEASURE.get_text_width_height_descent(text, FontProperties(size=points), ismath=False)
    return width / DPI


_MEASURE = _OutlineTextRenderer(1, 1, DPI)


def _place(fig: Figure, ax, left: float, top: float, width: float, height: float) -> None:
    """Put `ax` at `left` inches from the figure's left edge and `top` inches from its top, `width` x `height`."""
    fig_w, fig_h = fig.get_size_inches()
    ax.set_position([left / fig_w, 1.0 - (top + height) / fig_h, width / fig_w, height / fig_h])


def _empty_figure(title: str, message: str) -> Figure:
    fig = Figure(figsize=(WIDTH_IN, 2.0), dpi=DPI)
    fig.suptitle(title, fontsize=12)
    fig.text(0.5, 0.45, message, ha="center", va="center", fontsize=10)
    return fig


def _caption_text(fig: Figure, left: float, top: float, lines: list[str]) -> None:
    """The caption's lines as one figure text, its top left corner `left`, `top` inches from the figure's top left."""
    width, height = fig.get_size_inches()
    fig.text(left / width, 1.0 - top / height, "\n".join(lines), ha="left", va="top", fontsize=8, color="#333333")


# ----------------------------------------------------------------- the history corrections
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
