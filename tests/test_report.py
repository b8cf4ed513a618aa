"""Report pictures and page: valid PNGs whose plotted numbers are the data's, and a page a watcher reads top down.

Weekly cycle 2026-02-02; history weeks W1 = 2026-01-12, W2 = 01-19, W3 = 01-26;
horizon H1 = 2026-02-02, H2 = 02-09, H3 = 02-16.
"""

from __future__ import annotations

import io
import re

import numpy as np
import pandas as pd
import pytest
from matplotlib import dates as mdates
from matplotlib import image as mimage
from PIL import Image

from pipelines.engines import report_charts, report_html

CYCLE = pd.Timestamp("2026-02-02")
W1, W2, W3 = "2026-01-12", "2026-01-19", "2026-01-26"
H1, H2, H3 = "2026-02-02", "2026-02-09", "2026-02-16"


def frame(rows, columns):
    out = pd.DataFrame(rows, columns=columns)
    out["period_start"] = pd.to_datetime(out["period_start"])
    return out


def history(rows):
    """rows: (product, site, customer, period_start, quantity)."""
    return frame(rows, ["product", "site", "customer", "period_start", "quantity"]).astype({"quantity": float})


def num(day) -> float:
    return float(mdates.date2num(pd.Timestamp(day)))


def line(ax, label):
    (found,) = [ln for ln in ax.get_lines() if ln.get_label() == label]
    return dict(
        zip(
            np.round(found.get_xdata(orig=False).astype(float), 6),
            found.get_ydata(orig=False).astype(float),
            strict=False,
        )
    )


def decode(png: bytes) -> np.ndarray:
    assert png[:8] == b"\x89PNG\r\n\x1a\n"
    with Image.open(io.BytesIO(png)) as img:
        img.verify()
    return mimage.imread(io.BytesIO(png), format="png")


def pixels_of(image: np.ndarray, hex_color: str) -> int:
    rgb = np.array([int(hex_color[i : i + 2], 16) for i in (1, 3, 5)]) / 255
    return int((np.abs(image[..., :3] - rgb).max(axis=2) < 0.02).sum())


# ------------------------------------------------------------------ parent chart
@pytest.fixture
def parents():
    # P1 x S1: 5+5, 6+6, 7+7 = 10, 12, 14 (36); P2 x S1: 20 a week (60, the largest);
    # P3 x S1: 1 a week (3); P9 x S1 has no forecast (another class) and is ignored.
    hist = history(
        [("P1", "S1", c, w, q) for w, q in ((W1, 5), (W2, 6), (W3, 7)) for c in ("C1", "C2")]
        + [("P2", "S1", "C1", w, 20) for w in (W1, W2, W3)]
        + [("P3", "S1", "C1", w, 1) for w in (W1, W2, W3)]
        + [("P9", "S1", "C1", w, 100) for w in (W1, W2, W3)]
    )
    fc = {"P1": (15, 15, 15), "P2": (21, 22, 23), "P3": (1, 1, 1)}
    forecast = frame(
        [("a", p, "S1", h, float(v)) for p, values in fc.items() for h, v in zip((H1, H2, H3), values, strict=False)],
        ["product_class", "product", "site", "period_start", "forecast"],
    )
    return hist, forecast


def test_parent_chart_plots_class_total_and_the_largest_parents(parents):
    hist, forecast = parents
    fig = report_charts.parent_chart_figure(hist, forecast, product_class="a", cycle_date=CYCLE, top_parents=2)
    total, first, second = fig.axes[:3]
    # class total: history 10+20+1 = 31, 12+20+1 = 33, 14+20+1 = 35 (P9 left out); forecast 15+21+1 = 37, 38, 39
    assert line(total, "history") == {num(W1): 31.0, num(W2): 33.0, num(W3): 35.0}
    assert line(total, "forecast") == {num(H1): 37.0, num(H2): 38.0, num(H3): 39.0}
    cycle = line(total, "cycle date 2026-02-02")
    assert set(cycle) == {num(CYCLE)}
    # largest first: P2 (60 of 99 = 61 %), then P1 (36 of 99 = 36 %)
    assert first.get_title(loc="left") == "P2 x S1  (61% of class history)"
    assert second.get_title(loc="left") == "P1 x S1  (36% of class history)"
    assert line(second, "history") == {num(W1): 10.0, num(W2): 12.0, num(W3): 14.0}
    assert line(first, "forecast") == {num(H1): 21.0, num(H2): 22.0, num(H3): 23.0}
    caption = " ".join(t.get_text() for t in fig.texts)
    assert "Not drawn (1, largest first): P3 x S1." in caption
    assert "Product class a" in fig.get_suptitle() and "2026-02-02" in fig.get_suptitle()
    assert total.get_ylabel() == "quantity per week"


def test_parent_chart_draws_only_the_last_history_periods_asked_for(parents):
    hist, forecast = parents
    fig = report_charts.parent_chart_figure(hist, forecast, product_class="a", cycle_date=CYCLE, history_periods=2)
    # the last 2 weeks before the cycle date: W2 33, W3 35
    assert line(fig.axes[0], "history") == {num(W2): 33.0, num(W3): 35.0}


def test_parent_chart_png_is_valid_deterministic_and_shows_the_forecast(parents):
    hist, forecast = parents
    png = report_charts.parent_chart(hist, forecast, product_class="a", cycle_date=CYCLE, top_parents=2)
    fig = report_charts.parent_chart_figure(hist, forecast, product_class="a", cycle_date=CYCLE, top_parents=2)
    image = decode(png)
    width, height = fig.get_size_inches() * report_charts.DPI
    assert image.shape[:2] == (round(height), round(width))
    assert pixels_of(image, report_charts.FORECAST_COLOR) > 100  # the orange forecast lines are drawn
    assert png == report_charts.parent_chart(hist, forecast, product_class="a", cycle_date=CYCLE, top_parents=2)


def test_text_outlines_and_extents_kept_across_figures_are_the_fonts_own(parents):
    # reference: matplotlib's own TextToPath and Agg renderer, nothing kept; the same text at two weights and sizes
    from matplotlib.backends.backend_agg import RendererAgg
    from matplotlib.font_manager import FontProperties
    from matplotlib.textpath import TextToPath

    from pipelines.engines import chart_base

    kept, plain = chart_base._OutlineTextRenderer(10, 10, report_charts.DPI), RendererAgg(10, 10, report_charts.DPI)
    for size, weight in ((8, "normal"), (13, "bold"), (8, "bold"), (8, "normal")):
        prop = FontProperties(size=size, weight=weight)
        long = "Each panel: one parent's customers, each band a customer's share; before the cycle date " * 2
        for text in ("1,000", "history", "1,000", "", "é ü x", long, long):
            extent = kept.get_text_width_height_descent(text, prop, False)
            assert extent == plain.get_text_width_height_descent(text, prop, False)
            verts, codes = kept._text2path.get_text_path(prop, text)
            own_verts, own_codes = TextToPath().get_text_path(prop, text)
            assert np.array_equal(np.asarray(verts).reshape(-1, 2), np.asarray(own_verts).reshape(-1, 2))
            assert np.array_equal(np.asarray(codes), np.asarray(own_codes))
    hist, forecast = parents
    png = report_charts.parent_chart(hist, forecast, product_class="a", cycle_date=CYCLE, top_parents=2)
    chart_base._TEXT_PATHS._kept.clear()
    chart_base._TEXT_EXTENTS.clear()
    assert png == report_charts.parent_chart(hist, forecast, product_class="a", cycle_date=CYCLE, top_parents=2)


def test_png_holds_the_pixels_savefig_writes(parents):
    from pipelines.engines import chart_base

    # any pixels, alpha included, read back as given; the resolution as savefig writes it (100 dpi)
    pixels = np.random.default_rng(5).integers(0, 256, (7, 5, 4), dtype=np.uint8)
    with Image.open(io.BytesIO(chart_base.png_bytes(pixels, 100))) as img:
        assert img.mode == "RGBA" and np.array_equal(np.asarray(img), pixels)
        assert [round(v) for v in img.info["dpi"]] == [100, 100]
    # a chart: the pixels of matplotlib's own savefig (Pillow's encoder) of the same figure
    hist, forecast = parents
    png = report_charts.parent_chart(hist, forecast, product_class="a", cycle_date=CYCLE, top_parents=2)
    fig = report_charts.parent_chart_figure(hist, forecast, product_class="a", cycle_date=CYCLE, top_parents=2)
    chart_base._Canvas(fig)
    saved = io.BytesIO()
    fig.savefig(saved, format="png", dpi=report_charts.DPI)
    with Image.open(io.BytesIO(png)) as mine, Image.open(saved) as theirs:
        assert mine.size == theirs.size and np.array_equal(np.asarray(mine), np.asarray(theirs))


def test_parent_chart_of_a_class_without_parents_is_still_a_picture(parents):
    hist, forecast = parents
    png = report_charts.parent_chart(hist, forecast, product_class="b", cycle_date=CYCLE)
    assert decode(png).shape[1] == round(report_charts.WIDTH_IN * report_charts.DPI)


# ------------------------------------------------------------------ share chart
@pytest.fixture
def shares_input():
    # P1 x S1, history:      W1   W2   W3
    #   C1                    6    0    3
    #   C2                    3    0    3
    #   C3                    1    0    2
    #   C4                    0    0    2
    #   parent               10    0   10   -> W2 has no share (blank)
    # shares W1: .6 .3 .1 0; W3: .3 .3 .2 .2; horizon (target) H1, H2: .5 .3 .1 .1
    # P2 x S1 (1 a week) is smaller and is not drawn with top_parents=1.
    hist = history(
        [
            ("P1", "S1", c, w, q)
            for c, qs in {"C1": (6, 0, 3), "C2": (3, 0, 3), "C3": (1, 0, 2), "C4": (0, 0, 2)}.items()
            for w, q in zip((W1, W2, W3), qs, strict=False)
        ]
        + [("P2", "S1", "C1", w, 1) for w in (W1, W2, W3)]
    )
    target = frame(
        [
            ("P1", "S1", c, h, s, s * 10)
            for c, s in {"C1": 0.5, "C2": 0.3, "C3": 0.1, "C4": 0.1}.items()
            for h in (H1, H2)
        ]
        + [("P2", "S1", "C1", h, 1.0, 1.0) for h in (H1, H2)],
        ["product", "site", "customer", "period_start", "share", "target"],
    )
    return hist, target


def bands(ax):
    """{label: {x: (bottom, height, width)}} read back from the stacked bars' rectangles (x, width in days)."""
    out = {}
    for collection in ax.collections:
        cells = {}
        for path in collection.get_paths():
            (x0, y0), (x1, y1) = path.vertices.min(axis=0), path.vertices.max(axis=0)
            cells[round(float(x0), 6)] = (round(float(y0), 9), round(float(y1 - y0), 9), float(x1 - x0))
        out[collection.get_label()] = cells
    return out


def test_share_chart_stacks_history_and_horizon_shares_with_other(shares_input):
    hist, target = shares_input
    fig = report_charts.share_chart_figure(
        hist, target, product_class="a", cycle_date=CYCLE, top_parents=1, top_children=2
    )
    ax = fig.axes[0]
    # mean shares over W1, W3, H1, H2 (W2 blank): C1 (.6+.3+.5+.5)/4 = .475, C2 .3, C3 .125, C4 .1 -> top 2: C1, C2
    # other = C3 + C4: W1 .1, W3 .4, H1 .2, H2 .2; labels carry the share in the first horizon period
    got = bands(ax)
    heights = {label: {x: h for x, (_, h, _) in cells.items()} for label, cells in got.items()}
    assert heights == {
        "C1  50.0%": {num(W1): 0.6, num(W3): 0.3, num(H1): 0.5, num(H2): 0.5},
        "C2  30.0%": {num(W1): 0.3, num(W3): 0.3, num(H1): 0.3, num(H2): 0.3},
        "other (2 customers)  20.0%": {num(W1): 0.1, num(W3): 0.4, num(H1): 0.2, num(H2): 0.2},
    }
    # stacked: each band starts where the one below ends; every bar is one week (7 days) wide
    c1, c2, other = got["C1  50.0%"], got["C2  30.0%"], got["other (2 customers)  20.0%"]
    for x in c1:
        assert c1[x][0] == 0.0
        assert c2[x][0] == pytest.approx(c1[x][1])
        assert other[x][0] == pytest.approx(c1[x][1] + c2[x][1])
        assert other[x][0] + other[x][1] == pytest.approx(1.0)
        assert c1[x][2] == 7.0
    # the legend lists the bands top down as stacked: other, C2, C1
    legend = [t.get_text() for t in ax.get_legend().get_texts()]
    assert legend[:3] == ["other (2 customers)  20.0%", "C2  30.0%", "C1  50.0%"]
    assert ax.get_title(loc="left") == "P1 x S1: 4 customers"
    caption = " ".join(t.get_text() for t in fig.texts)
    assert "Not drawn (1, largest first): P2 x S1." in caption
    assert set(line(ax, "cycle date 2026-02-02")) == {num(CYCLE)}


def test_share_chart_marks_the_window_start_and_renders(shares_input, make_share_table):
    hist, target = shares_input
    shares = make_share_table(
        [("P1", "S1", c, 0.25) for c in ("C1", "C2", "C3", "C4")]
    )  # window 4 -> starts 2026-01-05
    fig = report_charts.share_chart_figure(
        hist, target, product_class="a", cycle_date=CYCLE, top_parents=1, shares=shares
    )
    assert set(line(fig.axes[0], "share window start")) == {num("2026-01-05")}
    png = report_charts.share_chart(hist, target, product_class="a", cycle_date=CYCLE, top_parents=2, shares=shares)
    image = decode(png)
    assert image.shape[1] == round(report_charts.WIDTH_IN * report_charts.DPI)
    assert pixels_of(image, report_charts.CHILD_COLORS[0]) > 100


def drawn_boxes(fig):
    """Each axes' drawn extent (tick labels, labels, title, legend), the figure title's and the caption's, in pixels,
    after one draw."""
    report_charts.figure_png(fig)
    renderer = fig.canvas.get_renderer()
    title, caption = fig.texts  # the figure's own texts: its title, then the caption
    assert title.get_text() == fig.get_suptitle()
    return [ax.get_tightbbox(renderer) for ax in fig.axes], *(t.get_window_extent(renderer) for t in (title, caption))


def assert_laid_out(fig):
    """The fixed layout holds what it draws: every panel inside the figure, no two overlapping, the title above
    them and the caption below them (the margins come from the measured label widths, not from a layout engine).
    """
    boxes, title, caption = drawn_boxes(fig)
    width, height = fig.bbox.width, fig.bbox.height
    for box in boxes + [title, caption]:
        assert box.x0 >= 0 and box.y0 >= 0 and box.x1 <= width and box.y1 <= height, box
    for i, a in enumerate(boxes):
        for b in boxes[i + 1:]:
            assert not a.overlaps(b), (a, b)
    assert title.y0 > max(b.y1 for b in boxes) and caption.y1 < min(b.y0 for b in boxes)


def test_parent_chart_layout_holds_wide_tick_labels_and_an_odd_panel(parents):
    hist, forecast = parents
    hist = hist.assign(quantity=hist["quantity"] * 1_234_567.0)  # y tick labels up to "80,000,000"
    fig = report_charts.parent_chart_figure(hist, forecast, product_class="a", cycle_date=CYCLE, top_parents=3)
    assert_laid_out(fig)  # 3 panels in 2 columns: the right one's date labels hang into an empty place
    # date labels under the lowest panel of each column only; the others carry the same tick marks
    total, first, second, third = fig.axes
    assert [ax.xaxis.get_tick_params()["labelbottom"] for ax in (total, third)] == [True, True]
    assert [len(ax.xaxis.get_ticklocs()) > 0 for ax in (first, second)] == [False, True]
    (marks,) = [ln for ln in first.get_lines() if ln.get_label() == "_date ticks"]
    low, high = first.get_xlim()
    labelled = [t for t in third.xaxis.get_ticklocs() if low <= t <= high]
    assert list(marks.get_xdata()) == labelled


def test_share_chart_layout_holds_long_customer_names(shares_input):
    hist, target = shares_input
    long = "CUSTOMER-WITH-A-RATHER-LONG-NAME-0001"
    hist["customer"] = hist["customer"].replace("C1", long)
    target["customer"] = target["customer"].replace("C1", long)
    fig = report_charts.share_chart_figure(hist, target, product_class="a", cycle_date=CYCLE, top_parents=2)
    assert_laid_out(fig)
    assert any(t.get_text().startswith(long) for t in fig.axes[0].get_legend().get_texts())


@pytest.fixture
def two_years():
    """Two years of weekly history before the cycle and a 26-week horizon: date labels without an offset, so the
    charts draw every axis's ticks with their own artists (a short range keeps matplotlib's tick objects)."""
    weeks = pd.date_range(CYCLE - pd.Timedelta(weeks=104), periods=104, freq="7D")
    horizon = pd.date_range(CYCLE, periods=26, freq="7D")
    rng = np.random.default_rng(3)
    hist = history(
        [(p, "S1", c, w, float(q)) for p, scale in (("P1", 900), ("P2", 40), ("P3", 7)) for c in ("C1", "C2", "C3")
         for w, q in zip(weeks, rng.integers(0, scale, len(weeks)), strict=True)]
    )
    forecast = frame([("a", p, "S1", h, v * 1.5) for p, v in (("P1", 1200.0), ("P2", 55.0), ("P3", 9.0))
                      for h in horizon], ["product_class", "product", "site", "period_start", "forecast"])
    target = frame([(p, "S1", c, h, s, s * 10) for p in ("P1", "P2", "P3") for c, s in (("C1", 0.5), ("C2", 0.3),
                                                                                        ("C3", 0.2)) for h in horizon],
                   ["product", "site", "customer", "period_start", "share", "target"])
    return hist, forecast, target


def test_ticks_drawn_as_a_few_artists_are_matplotlibs_own_pixels(two_years, monkeypatch):
    # reference: the axes' own tick objects, as matplotlib makes and draws them (the y ticks and grid from the
    # axis's locator and formatter at draw, the date labels from a locator and formatter set on the axis)
    from matplotlib.ticker import FixedFormatter, FixedLocator

    from pipelines.engines import chart_axes

    hist, forecast, target = two_years
    where = {"product_class": "a", "cycle_date": CYCLE, "top_parents": 3}

    def pictures():
        return [report_charts.parent_chart(hist, forecast, **where),
                report_charts.share_chart(hist, target, **where)]

    own = pictures()
    drawn = report_charts.parent_chart_figure(hist, forecast, **where)
    assert not any(len(ax.yaxis.get_ticklocs()) or len(ax.xaxis.get_ticklocs()) for ax in drawn.axes)  # no tick objects

    def axis_grid(ax, grid):
        if grid:
            ax.grid(axis="y", color=chart_axes.GRID_COLOR, lw=chart_axes.GRID_WIDTH)

    def axis_dates(ax, which, locs, labels, limits, grid=False):
        ax.xaxis.set_major_locator(FixedLocator(locs))
        ax.xaxis.set_major_formatter(FixedFormatter(labels))
        return []

    monkeypatch.setattr(report_charts, "value_ticks", axis_grid)
    monkeypatch.setattr(chart_axes, "tick_artists", axis_dates)
    for mine, reference in zip(own, pictures(), strict=True):
        assert np.array_equal(decode(mine), decode(reference))
        assert mine == reference


def test_history_shares_leave_out_periods_without_volume_or_with_a_shortage():
    hist = history(
        [
            ("P1", "S1", "C1", W1, 3),
            ("P1", "S1", "C2", W1, 1),
            ("P1", "S1", "C1", W2, 0),
            ("P1", "S1", "C1", W3, 2),
            ("P1", "S1", "C2", W3, 2),
        ]
    )
    hist["shortage"] = [False, False, False, True, False]  # W3 short on one row: the whole parent period is out
    got = report_charts.history_period_shares(hist).set_index(["customer", "period_start"])["share"]
    # W1: 3 / 4 = .75, 1 / 4 = .25; W2: parent 0 -> NaN; W3: shortage -> NaN
    assert got[("C1", pd.Timestamp(W1))] == 0.75
    assert got[("C2", pd.Timestamp(W1))] == 0.25
    assert np.isnan(got[("C1", pd.Timestamp(W2))])
    assert got.xs(pd.Timestamp(W3), level="period_start").isna().all()


# ------------------------------------------------------------------ page
HOSTILE = "<script>alert(1)</script>"


@pytest.fixture
def page_input(make_share_table):
    shares = make_share_table(
        [
            ("P1", "S1", "C1", 0.6), ("P1", "S1", "C2", 0.4, 4, {"rule": "phase_out"}),
            ("P2", "S1", "C1", 1.0, 8),
        ]
    )
    shares.loc[shares["product"] == "P2", "fallback"] = "longer_window"
    shares.loc[shares["customer"] == "C1", "product_class"] = ["a", HOSTILE]
    checks = [
        ("raw_history", "raw_history_matches_schema", True, "ERROR", "Proves that raw_history matches its model."),
        ("share_tables", "new_customers_have_share", False, "WARN", "Lists new customers without a share."),
        ("reconciliation", "children_sum_to_parent", False, "ERROR", f"Proves children sum to parent {HOSTILE}."),
    ]
    rejected = pd.DataFrame(
        {
            "source_file": ["h.csv"] * 3,
            "source_row": [9, 2, 5],
            "product": ["<img src=x onerror=alert(1)>", "P1", "P1"],
            "site": ["S1"] * 3,
            "customer": ["", "", "C1"],
            "period_start": ["2026-01-05", "2026-01-05", "bad"],
            "quantity": ["1", "2", "3"],
            "reason": ["missing_key", "missing_key", "bad_date"],
        }
    )
    return shares, checks, rejected


def test_page_lists_failed_checks_first_and_escapes_every_text(page_input):
    shares, checks, rejected = page_input
    page = report_html.cycle_report_html(
        cycle_date=CYCLE, share_tables=shares, checks=checks, rejected_rows=rejected,
        charts={HOSTILE: ['parents_a"b.png']},
    )
    # failed ERROR, then failed WARN, then passed
    assert (
        page.index("children_sum_to_parent")
        < page.index("new_customers_have_share")
        < page.index("raw_history_matches_schema")
    )
    assert page.index('id="checks"') < page.index('id="classes"')
    assert "1 blocking (ERROR) check(s) failed and 1 warning(s)" in page
    assert "<script" not in page.lower() and "<img src=x" not in page
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in page
    assert '<img src="parents_a%22b.png"' in page  # the file name quoted into the attribute
    assert "http://" not in page and "https://" not in page and "<link" not in page  # self-contained
    assert "No previous cycle" in page


def test_page_counts_rejected_rows_and_orders_movers_by_size(page_input):
    shares, checks, rejected = page_input
    movers = pd.DataFrame(
        {
            "product_class": ["a"] * 3, "product": ["P1"] * 3, "site": ["S1"] * 3, "customer": ["C1", "C2", "C3"],
            "share_previous": [0.5, 0.43, 0.07], "share_current": [0.51, 0.40, 0.075], "change_pp": [1.0, -3.0, 0.5],
        }
    )
    page = report_html.cycle_report_html(
        cycle_date=CYCLE, share_tables=shares, checks=checks, rejected_rows=rejected, movers=movers
    )
    assert "No previous cycle" not in page
    section = page[page.index('id="movers"'):page.index('id="rejected"')]
    # |change|: C2 3.0, C1 1.0, C3 0.5
    assert [m for m in re.findall(r"<td>(C\d)</td>", section)] == ["C2", "C1", "C3"]
    assert "<td>43.00 %</td>" not in section and '<td class="num">43.00 %</td>' in section
    assert '<td class="num">-3.00</td>' in section
    rejected_part = page[page.index('id="rejected"'):page.index('id="charts"')]
    assert "3 history lines were not used" in rejected_part
    assert '<td>missing_key</td><td class="num">2</td>' in rejected_part
    assert '<td>bad_date</td><td class="num">1</td>' in rejected_part
    # the sample by file and row: rows 2, 5, 9
    assert [int(r) for r in re.findall(r'<td>h\.csv</td><td class="num">(\d+)</td>', rejected_part)] == [2, 5, 9]


def test_class_summary_counts_parents_children_fallbacks_and_rules(page_input):
    shares, _, _ = page_input
    shares = shares.assign(product_class="a")
    forecast = pd.DataFrame({"product_class": ["a", "a"], "strategy": ["top_down", "top_down"]})
    row = report_html.class_summary(shares, forecast).iloc[0]
    # 2 parents (P1, P2), 3 children; P2 fell back to its 8-week window; C2 of P1 phases out
    assert (row["parents"], row["children"]) == (2, 3)
    assert (row["fallback_longer_window"], row["fallback_even"]) == (1, 0)
    assert row["windows_used"] == "4, 8"
    assert row["lifecycle_rules"] == "phase_out 1"
    assert row["strategy"] == "top_down"


def test_all_checks_passed_banner(page_input):
    shares, checks, _ = page_input
    page = report_html.cycle_report_html(
        cycle_date=CYCLE, share_tables=shares, checks=[c[:2] + (True,) + c[3:] for c in checks]
    )
    assert "All 3 checks passed." in page
    assert "No rejected rows table was given." in page


def test_chart_file_name_is_safe():
    assert report_charts.chart_file_name("shares", "a/b c", "2026-02-02") == "shares_a-b-c_2026-02-02.png"


def test_each_failed_check_shows_its_first_rows_and_what_to_do_escaped(page_input):
    shares, _, _ = page_input
    rows = (
        "| file | row | customer | column | value |\n|:--|--:|:--|:--|:--|\n"
        f"| pins.csv | 1 | C77 | customer | {HOSTILE} |\n"
    )
    checks = [
        (
            "pins [a]", "references_known", False, "ERROR", "Proves pins name known customers.", rows,
            "correct the customer",
        ),
        ("products [a]", "products_matches_schema", True, "ERROR", "Proves products match.", "", ""),
    ]
    page = report_html.cycle_report_html(cycle_date=CYCLE, share_tables=shares, checks=checks)
    section = page[page.index("First failing rows"):]
    assert "<th>file</th><th>row</th><th>customer</th><th>column</th><th>value</th>" in section
    assert "<td>pins.csv</td><td>1</td><td>C77</td><td>customer</td>" in section
    assert "What to do: correct the customer" in section
    assert "<script" not in page.lower() and "products_matches_schema" not in section  # passed checks have no rows
    assert report_html.markdown_rows(rows)[0] == ["file", "row", "customer", "column", "value"]


def test_group_sums_are_pandas_group_sums_to_the_last_bit():
    # reference: pandas' group sum over the int key (compensated, rows in order, NaN skipped); key 3 has no row
    rng = np.random.default_rng(5)
    key = rng.choice([0, 1, 2, 4], 10_000)
    values = rng.normal(100.0, 30.0, 10_000) * rng.random(10_000)
    values[::97] = np.nan
    from pipelines.engines.chart_data import group_sums

    sums, present = group_sums(values, key, 5)
    expected = pd.Series(values).groupby(key).sum()
    assert sums[[0, 1, 2, 4]].tolist() == expected.tolist()  # exact, not approximate
    assert sums[3] == 0.0 and present.tolist() == [True, True, True, False, True]
