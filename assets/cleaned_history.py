"""Assets `cleaned_history`, `rejected_rows`, `history_corrections`, `cycle_calendar`."""

from assets.factory import StageAsset, Table, stage_asset
from pipelines.resources import report_folder
from pipelines.stages import cleaned_history as stage

CLEANED_HISTORY = "cleaned_history"
REJECTED_ROWS = "rejected_rows"
HISTORY_CORRECTIONS = "history_corrections"
CYCLE_CALENDAR = "cycle_calendar"

cleaned_history = stage_asset(StageAsset(
    tables=(
        Table(
            CLEANED_HISTORY,
            "One cleaned value per leaf and period, zero-filled inside each series' span; "
            "returns netted, outliers corrected per product class, supply-shortage periods flagged.",
        ),
        Table(REJECTED_ROWS, "Raw history lines that could not be used, each with its reason."),
        Table(HISTORY_CORRECTIONS, "Every value a cleansing rule changed: before, after, rule, parameters."),
        Table(CYCLE_CALENDAR, "The cycle date, calendar and history range of this cycle."),
    ),
    run=stage.run,
    settings=lambda part: stage.CleaningSettings.of(part.config, report_folder(part.config)),
    group="history",
    ins=("raw_history", "products", "customer_spans", "shortages"),
))
