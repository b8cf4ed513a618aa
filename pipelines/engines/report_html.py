"""The cycle's static HTML page: checks, classes, share movers, rejected rows and charts.

- `cycle_report_html`: a self-contained page (inline CSS, no script, images by
  relative file name in the same folder) with the checks (failed first: ERROR,
  then WARN), the classes, the biggest share movers, the rejected rows and the
  charts. Every text from the data is escaped with `html.escape`.

Pure functions: frames of one cycle in, an HTML string out. Nothing here reads
the store or knows of Dagster.
"""

from __future__ import annotations

import html
import urllib.parse
from collections.abc import Mapping, Sequence

import numpy as np
import pandas as pd

from pipelines.engines.report_choices import CHOICE_HEADERS, choice_rows
from pipelines.keys import PARENT

# A check is (asset, check, passed, severity, description[, first_rows[, what_to_do]]); severity "ERROR" or
# "WARN"; first_rows a markdown table of its first failing rows, what_to_do the advice for a failure.
Check = tuple
MOVER_COLUMNS = ["product_class", "product", "site", "customer", "share_previous", "share_current", "change_pp"]


# ----------------------------------------------------------------- 3. the HTML page
def class_summary(
    share_tables: pd.DataFrame, parent_forecast: pd.DataFrame | None = None, strategy_choice: pd.DataFrame | None = None
) -> pd.DataFrame:
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


def _choices_table(strategy_choice: pd.DataFrame | None, share_tuning: pd.DataFrame | None) -> str:
    """The backtest's choices per class (`report_choices`), '' when neither table is stored."""
    rows = [[_e(v) for v in r] for r in choice_rows(strategy_choice, share_tuning)]
    return "<h3>Backtest choices</h3>" + _html_table(CHOICE_HEADERS, rows) if rows else ""


_CSS = """
body { font-family: system-ui, -apple-system, "Segoe UI", Roboto, Arial, sans-serif; margin: 1.5rem auto;
       max-width: 1200px;
       color: #222; line-height: 1.4; padding: 0 1rem; }
h1 { font-size: 1.5rem; margin-bottom: .2rem; }
h2 { font-size: 1.2rem; margin-top: 2rem; border-bottom: 1px solid #ccc; }
h3 { font-size: 1.05rem; } .meta { color: #555; margin-top: 0; }
table { border-collapse: collapse; margin: .5rem 0 1rem; font-size: .9rem; }
th, td { border: 1px solid #d0d0d0; padding: .25rem .5rem; text-align: left; vertical-align: top; }
th { background: #f3f3f3; } td.num { text-align: right; font-variant-numeric: tabular-nums; }
td.desc { color: #444; font-size: .85rem; max-width: 40rem; }
tr.failed-error td { background: #fde2e1; } tr.failed-warn td { background: #fff4d6; }
.status { font-weight: bold; white-space: nowrap; }
.banner { padding: .6rem 1rem; border-radius: 4px; font-weight: bold; }
.banner.error { background: #f8c9c6; border: 1px solid #c62828; }
.banner.warn { background: #ffe9a8; border: 1px solid #b28704; }
.banner.ok { background: #d6efd6; border: 1px solid #2e7d32; }
figure { margin: 1rem 0; } figure img { max-width: 100%; border: 1px solid #ddd; }
figcaption { color: #555; font-size: .85rem; }
.empty { color: #666; font-style: italic; }
"""


def _e(value) -> str:
    """Escaped text of a cell: blanks (None, NaN, NaT) as ''."""
    if value is None or (not isinstance(value, str) and pd.api.types.is_scalar(value) and pd.isna(value)):
        return ""
    if isinstance(value, pd.Timestamp):
        return html.escape(f"{value:%Y-%m-%d}")
    return html.escape(str(value))


def _html_table(
    headers: Sequence[str],
    rows: Sequence[Sequence[str]],
    row_classes: Sequence[str] | None = None,
    numeric: Sequence[int] = (),
) -> str:
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
        for column, value in zip(frame.columns, record, strict=False):
            fmt = numeric_format.get(column)
            cells.append(_e(format(value, fmt) if fmt and pd.notna(value) else value))
        rows.append(cells)
    numeric = [
        i
        for i, c in enumerate(frame.columns)
        if pd.api.types.is_numeric_dtype(frame[c]) and not pd.api.types.is_bool_dtype(frame[c])
    ]
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
        banner = (
            f'<p class="banner warn">{failed_other} warning (WARN) check(s) failed; the cycle went on. See '
            'the first rows below.</p>'
        )
    elif ordered:
        banner = f'<p class="banner ok">All {len(ordered)} checks passed.</p>'
    else:
        banner = '<p class="banner warn">No check results were given for this cycle.</p>'
    rows, classes = [], []
    for asset, name, passed, severity, description, *_ in ordered:
        sev = str(severity).upper()
        status = "passed" if passed else "FAILED"
        classes.append("" if passed else ("failed-error" if sev == "ERROR" else "failed-warn"))
        rows.append(
            [
                f'<span class="status">{status}</span>',
                _e(sev),
                _e(asset),
                _e(name),
                f'<span class="desc">{_e(description)}</span>',
            ]
        )
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
    table = _html_table(
        ["class", "product", "site", "customer", "share previous", "share current", "change (points)"],
        rows,
        numeric=[4, 5, 6],
    )
    return (
        head
        + f"<p>The {len(frame)} largest changes of base share against the previous cycle, of "
          f"{len(movers)}.</p>{table}</section>"
    )


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
            parts.append(
                f'<figure><img src="{src}" alt="{_e(file_name)}"><figcaption>{_e(file_name)}</figcaption></figure>'
            )
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
    notice: str | None = None,
    share_tuning: pd.DataFrame | None = None,
) -> str:
    """A static, self-contained HTML page of one cycle.

    Sections, in order: checks (failed ERROR, failed WARN, then passed, with a
    banner), product classes (`class_summary`), biggest share movers (`movers`
    with MOVER_COLUMNS, `change_pp` in percentage points; None or empty = "no
    previous cycle"), rejected rows (counts by reason and the first
    `sample_rows` by file and row), charts (`charts`: product class -> image
    file names in the page's folder). `calendar` is the one-row
    `cycle_calendar` (period kind, horizon, history range) when given.
    `notice`: a line shown under the title (the cycle's publication state).
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
        f'<p class="notice"><strong>{_e(notice)}</strong></p>' if notice else "",
        '<nav><a href="#checks">Checks</a> | <a href="#classes">Product classes</a> | <a href="#movers">Share '
        'movers</a> | '
        '<a href="#rejected">Rejected rows</a> | <a href="#charts">Charts</a></nav>',
        _checks_section(checks),
        f'<section id="classes"><h2>Product classes</h2>{classes}',
        _choices_table(strategy_choice, share_tuning) + "</section>",
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
