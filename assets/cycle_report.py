"""Asset `cycle_report`: the class's charts (PNG) and the cycle's HTML page in var/reports/<cycle>/."""

import base64

import dagster as dg
import pandas as pd

from assets.common import schema_check_spec, table_metadata, validate
from pipelines.cycle_report import REPORT_FILE, write_cycle_report
from pipelines.engines import report_charts
from pipelines.partitions import cycle_class_partitions, partition_config, split_key
from pipelines.resources import PlanningConfigResource, report_folder
from pipelines.schemas import CycleReportFiles

CYCLE_REPORT = "cycle_report"


@dg.asset(
    name=CYCLE_REPORT,
    group_name="report",
    partitions_def=cycle_class_partitions,
    kinds={"pandas", "matplotlib", "html"},
    deps=["share_drift", "reconciliation"],
    check_specs=[schema_check_spec(CYCLE_REPORT, CycleReportFiles)],
    description="Pictures of the class in this cycle - its parents' history and forecast, its children's shares as a "
    "stacked area over history and horizon - shown here and written to var/reports/<cycle>/, and the cycle's HTML "
    "page there (every class of the cycle: checks with status, classes, biggest share movers, rejected rows, charts).",
)
def cycle_report(
    context: dg.AssetExecutionContext,
    planning: PlanningConfigResource,
    lifecycle_history: pd.DataFrame,
    parent_forecast: pd.DataFrame,
    reinitialized_target: pd.DataFrame,
    share_tables: pd.DataFrame,
    cycle_calendar: pd.DataFrame,
):
    config = partition_config(context, planning.config)
    cycle, product_class = split_key(context.partition_key)
    folder = report_folder(config)
    folder.mkdir(parents=True, exist_ok=True)
    period = config.calendar.period
    pictures = {
        "parents": report_charts.parent_chart(lifecycle_history, parent_forecast, product_class=product_class, cycle_date=cycle, period=period),
        "shares": report_charts.share_chart(
            lifecycle_history, reinitialized_target, product_class=product_class, cycle_date=cycle, period=period, shares=share_tables
        ),
    }
    rows, images = [], {}
    for kind, png in pictures.items():
        path = folder / report_charts.chart_file_name(kind, product_class, cycle)
        path.write_bytes(png)
        rows.append({"product_class": product_class, "kind": kind, "path": str(path), "bytes": len(png)})
        images[f"{kind}_chart"] = dg.MetadataValue.md(f"![{kind} of {product_class}, cycle {cycle}](data:image/png;base64,{base64.b64encode(png).decode()})")
        images[f"{kind}_chart_file"] = dg.MetadataValue.path(str(path))
    page = write_cycle_report(planning.config, context.instance, cycle)
    rows.append({"product_class": product_class, "kind": "html", "path": str(page), "bytes": page.stat().st_size})
    files, check = validate(pd.DataFrame(rows), CycleReportFiles, CYCLE_REPORT)
    context.log.info(f"{product_class}: charts and {REPORT_FILE} written to {folder}")
    yield dg.Output(files, metadata={**table_metadata(files, report_page=dg.MetadataValue.path(str(page))), **images})
    yield check
