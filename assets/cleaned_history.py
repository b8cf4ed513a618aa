"""Assets `cleaned_history`, `rejected_rows`, `history_corrections`, `cycle_calendar`."""

import dagster as dg
import pandas as pd

from assets.common import markdown, rule_check, schema_check_spec, table_metadata, validate
from pipelines.engines.report_charts import corrections_chart
from pipelines.partitions import cycle_class_partitions, partition_config
from pipelines.resources import PlanningConfigResource, report_folder
from pipelines.schemas import CleanedHistory, CycleCalendar, HistoryCorrections, RejectedRows
from pipelines.stages.cleaned_history import clean_history, find_unexplained_changes, line_accounting
from pipelines.stages.cleaned_history import cycle_calendar as make_cycle_calendar

CLEANED_HISTORY = "cleaned_history"
REJECTED_ROWS = "rejected_rows"
HISTORY_CORRECTIONS = "history_corrections"
CYCLE_CALENDAR = "cycle_calendar"
EVERY_RAW_ROW_ACCOUNTED = "every_raw_row_accounted"
CORRECTIONS_EXPLAIN_CHANGES = "corrections_explain_changes"
REJECTED_ROWS_WITHIN_LIMIT = "rejected_rows_within_limit"
REJECTED_CHECK_TEXT = (
    "Warns when more than monitoring.max_rejected_share of the class's raw history lines were rejected (lines on or "
    "after the cycle date are not counted: they belong to a later cycle), with counts by reason and a sample. When "
    "it fires, correct the listed lines at their source (file and row are given) or the master data they miss, "
    "and rerun the cycle."
)


@dg.multi_asset(
    group_name="history",
    partitions_def=cycle_class_partitions,
    outs={
        CLEANED_HISTORY: dg.AssetOut(
            kinds={"pandas", "duckdb"},
            description="One cleaned value per leaf and period, zero-filled inside each series' span; "
            "returns netted, outliers corrected per product class, supply-shortage periods flagged.",
        ),
        REJECTED_ROWS: dg.AssetOut(kinds={"pandas", "duckdb"}, description="Raw history lines that could not be used, each with its reason."),
        HISTORY_CORRECTIONS: dg.AssetOut(kinds={"pandas", "duckdb"}, description="Every value a cleansing rule changed: before, after, rule, parameters."),
        CYCLE_CALENDAR: dg.AssetOut(kinds={"pandas", "duckdb"}, description="The cycle date, calendar and history range of this cycle."),
    },
    check_specs=[
        schema_check_spec(CLEANED_HISTORY, CleanedHistory),
        schema_check_spec(REJECTED_ROWS, RejectedRows),
        schema_check_spec(HISTORY_CORRECTIONS, HistoryCorrections),
        schema_check_spec(CYCLE_CALENDAR, CycleCalendar),
        dg.AssetCheckSpec(
            EVERY_RAW_ROW_ACCOUNTED,
            asset=CLEANED_HISTORY,
            blocking=True,
            description="Proves raw lines = lines summed into cleaned_history + rejected_rows, so no line is lost. "
            "When it fails, compare the counts in the metadata and report the stage as a bug.",
        ),
        dg.AssetCheckSpec(REJECTED_ROWS_WITHIN_LIMIT, asset=REJECTED_ROWS, blocking=False, description=REJECTED_CHECK_TEXT),
        dg.AssetCheckSpec(
            CORRECTIONS_EXPLAIN_CHANGES,
            asset=CLEANED_HISTORY,
            blocking=True,
            description="Proves, per series, raw total + audited corrections = cleaned total, so every changed "
            "number is in history_corrections. When it fails, the series listed changed without an audit row.",
        ),
    ],
    can_subset=False,
)
def cleaned_history(
    context: dg.AssetExecutionContext,
    planning: PlanningConfigResource,
    raw_history: pd.DataFrame,
    products: pd.DataFrame,
    customer_spans: pd.DataFrame,
    shortages: pd.DataFrame,
):
    config = partition_config(context, planning.config)
    result = clean_history(raw_history, products, customer_spans, config, shortages=shortages)
    cleaned, cleaned_check = validate(result.cleaned, CleanedHistory, CLEANED_HISTORY)
    rejected, rejected_check = validate(result.rejected, RejectedRows, REJECTED_ROWS)
    corrections, corrections_check = validate(result.corrections, HistoryCorrections, HISTORY_CORRECTIONS)
    calendar, calendar_check = validate(make_cycle_calendar(result.cleaned, config, result.cycle_date), CycleCalendar, CYCLE_CALENDAR)
    counts = line_accounting(len(raw_history), result.cleaned, result.rejected)
    context.log.info(f"cycle date {result.cycle_date.date()}: {counts}")

    by_reason = rejected.groupby("reason").size().rename("lines").reset_index()
    by_rule = corrections.groupby("rule")["delta"].agg(["size", "sum"]).rename(columns={"size": "rows", "sum": "quantity_moved"}).reset_index()
    classes = products.drop_duplicates("product").set_index("product")["product_class"]
    by_rule_and_class = (
        corrections.assign(product_class=corrections["product"].map(classes))
        .groupby(["product_class", "rule"])["delta"]
        .agg(rows="size", quantity_moved="sum")
        .reset_index()
    )
    short = result.shortage_periods
    picture = report_folder(config) / f"cleansing_{next(iter(config.product_classes))}.png"
    picture.parent.mkdir(parents=True, exist_ok=True)
    picture.write_bytes(
        corrections_chart(by_rule_and_class, list(result.outlier_rules.get("product_class", [])), int(cleaned["shortage"].sum()))
    )
    yield dg.Output(
        cleaned,
        output_name=CLEANED_HISTORY,
        metadata=table_metadata(
            cleaned,
            cycle_date=str(result.cycle_date.date()),
            series=int(cleaned.groupby(["product", "site", "customer"]).ngroups),
            filled_periods=int(cleaned["filled"].sum()),
            corrected_periods=int(cleaned["corrected"].sum()),
            shortage_periods=int(cleaned["shortage"].sum()),
            shortage_records=len(short),
            shortage_records_without_series=int((short["children"] == 0).sum()) if len(short) else 0,
            shortage_rule=config.cleansing.shortages,
            corrections_by_rule=by_rule,
            corrections_by_class_and_rule=by_rule_and_class,
            outlier_rule_by_class=result.outlier_rules,
            shortages_flagged=short,
            corrections_picture=dg.MetadataValue.path(str(picture)),
            **counts,
        ),
    )
    yield dg.Output(rejected, output_name=REJECTED_ROWS, metadata=table_metadata(rejected, by_reason=by_reason))
    yield dg.Output(corrections, output_name=HISTORY_CORRECTIONS, metadata=table_metadata(corrections, by_rule=by_rule))
    yield dg.Output(calendar, output_name=CYCLE_CALENDAR, metadata=table_metadata(calendar))
    yield from (cleaned_check, rejected_check, corrections_check, calendar_check)
    unaccounted = pd.DataFrame([counts]) if counts["unaccounted"] else pd.DataFrame()
    yield rule_check(CLEANED_HISTORY, EVERY_RAW_ROW_ACCOUNTED, unaccounted, what="raw lines = used + rejected", **counts)
    yield rule_check(
        CLEANED_HISTORY,
        CORRECTIONS_EXPLAIN_CHANGES,
        find_unexplained_changes(result.cleaned, result.corrections),
        what="per series, raw + corrections = cleaned",
    )
    bad = rejected[rejected["reason"] != "on_or_after_cycle_date"]
    limit = config.monitoring.max_rejected_share
    fraction = len(bad) / len(raw_history) if len(raw_history) else 0.0
    yield rule_check(
        REJECTED_ROWS,
        REJECTED_ROWS_WITHIN_LIMIT,
        bad if fraction > limit else bad.iloc[0:0],
        what=REJECTED_CHECK_TEXT.split(" (lines")[0],
        severity=dg.AssetCheckSeverity.WARN,
        rejected=f"{len(bad)} of {len(raw_history)} lines ({fraction:.3%}; limit {limit:.3%})",
        by_reason=markdown(bad.groupby("reason").size().rename("lines").reset_index()),
    )
