"""Asset `cycle_report`: the class's charts (PNG) and the cycle's HTML page in var/reports/<cycle>/."""

import dataclasses

import dagster as dg
import pandas as pd

from assets.factory import Partition, StageAsset, Table, stage_asset
from pipelines.cycle_report import REPORT_FILE, write_cycle_report
from pipelines.resources import report_folder
from pipelines.results import StageResult
from pipelines.stages import cycle_report as stage

CYCLE_REPORT = "cycle_report"


def write_page(context: dg.AssetExecutionContext, part: Partition, result: StageResult) -> StageResult:
    """The cycle's page from the store and the checks' runs, added to the files the class wrote."""
    page = write_cycle_report(part.full, context.instance, part.cycle)
    row = {"product_class": part.product_class, "kind": "html", "path": str(page), "bytes": page.stat().st_size}
    files = pd.concat([result.outputs[CYCLE_REPORT], pd.DataFrame([row])], ignore_index=True)
    context.log.info(f"{part.product_class}: charts and {REPORT_FILE} written to {page.parent}")
    figures = {**result.metadata[CYCLE_REPORT], "report_page": page}
    return dataclasses.replace(result, outputs={CYCLE_REPORT: files}, metadata={CYCLE_REPORT: figures})


cycle_report = stage_asset(
    StageAsset(
        tables=(
            Table(
                CYCLE_REPORT,
                "Pictures of the class in this cycle - its parents' history and forecast, its children's shares as a "
                "stacked area over history and horizon - shown here and written to var/reports/<cycle>/, and the "
                "cycle's HTML "
                "page there (every class of the cycle: checks with status, classes, biggest share movers, "
                "rejected rows, charts).",
                frozenset({"pandas", "matplotlib", "html"}),
            ),
        ),
        run=stage.run,
        settings=lambda part: stage.ReportSettings(
            part.config.calendar.period, part.product_class, part.cycle, report_folder(part.config), part.key
        ),
        group="report",
        ins=("lifecycle_history", "parent_forecast", "reinitialized_target", "share_tables", "cycle_calendar"),
        deps=("share_drift", "reconciliation"),
        publish=write_page,
    )
)
