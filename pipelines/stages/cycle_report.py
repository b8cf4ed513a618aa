"""Stage `cycle_report`: the class's charts of this cycle, as PNG files beside the cycle's HTML page.

The charts (`pipelines.engines.report_charts`): the parents' history and
forecast, and the children's shares as a stacked area over history and
horizon. The page of the whole cycle is written after them from the store and
the checks' runs (`pipelines.cycle_report`), by the asset, which knows the
Dagster instance.
"""

from __future__ import annotations

import base64
import gc
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from pipelines.engines.chart_data import history_sums
from pipelines.engines.report_charts import chart_file_name, parent_chart, share_chart
from pipelines.results import Log, Markdown, StageResult, quiet


@dataclass(frozen=True)
class ReportSettings:
    period: str
    product_class: str
    cycle: str
    folder: Path
    files_as: str = ""  # the name in the chart files: a shard's key (`spares~2of3`), so shards write apart


@contextmanager
def _collector_paused():
    """Python's cyclic garbage collector paused while the charts are built and drawn: matplotlib makes some 10^5
    short-lived objects per figure, which start collections that walk the whole heap (the stage's long frames
    included), about a tenth of the stage's time. Restored as it was after; the figures' cycles are collected
    by the next collection."""
    was = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if was:
            gc.enable()


def run(
    lifecycle_history: pd.DataFrame,
    parent_forecast: pd.DataFrame,
    reinitialized_target: pd.DataFrame,
    share_tables: pd.DataFrame,
    cycle_calendar: pd.DataFrame,
    settings: ReportSettings,
    log: Log = quiet,
) -> StageResult:
    """The class's two charts as files, one row per file, and the pictures in the metadata."""
    where = {"product_class": settings.product_class, "cycle_date": settings.cycle, "period": settings.period}
    with _collector_paused():
        # the long history is summed per parent and period once, for both charts
        summed = history_sums(lifecycle_history, settings.cycle, settings.period)
        pictures = {
            "parents": parent_chart(lifecycle_history, parent_forecast, summed=summed, **where),
            "shares": share_chart(lifecycle_history, reinitialized_target, shares=share_tables, summed=summed, **where),
        }
    rows, files, figures = [], {}, {}
    for kind, png in pictures.items():
        name = chart_file_name(kind, settings.files_as or settings.product_class, settings.cycle)
        path = settings.folder / name
        files[name] = png
        rows.append({"product_class": settings.product_class, "kind": kind, "path": str(path), "bytes": len(png)})
        text = f"{kind} of {settings.product_class}, cycle {settings.cycle}"
        figures[f"{kind}_chart"] = Markdown(f"![{text}](data:image/png;base64,{base64.b64encode(png).decode()})")
        figures[f"{kind}_chart_file"] = path
    return StageResult(outputs={"cycle_report": pd.DataFrame(rows)}, metadata={"cycle_report": figures}, files=files)
