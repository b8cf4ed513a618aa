"""Assets `cleaned_history`, `rejected_rows`, `history_corrections`, `cycle_calendar`."""

import dataclasses

from assets.factory import Partition, StageAsset, Table, stage_asset
from assets.master_data import cut_part
from pipelines import input_cut
from pipelines.engines.class_rows import class_map, class_rows
from pipelines.engines.history_files import load_raw_history
from pipelines.resources import report_folder
from pipelines.stages import cleaned_history as stage
from pipelines.stages.master_data import load_customer_spans, load_products

CLEANED_HISTORY = "cleaned_history"
REJECTED_ROWS = "rejected_rows"
HISTORY_CORRECTIONS = "history_corrections"
CYCLE_CALENDAR = "cycle_calendar"


def cleaning_settings(part: Partition) -> stage.CleaningSettings:
    """The partition's cleaning settings; a shard's carry its class's first trusted period (`class_first_period`)."""
    settings = stage.CleaningSettings.of(part.config, report_folder(part.config))
    if part.shard is None:
        return settings
    return dataclasses.replace(settings, first_period=class_first_period(part))


def class_first_period(part: Partition) -> int | None:
    """The first period (ordinal) of the whole class's trusted history: the class's lines rejected as the class's
    run would (the shard's history starts there, so its grid and fill ranges are the class's). From the cycle's
    cut, which found it once for the class (`pipelines.input_cut`); without the cut (or when the cut could not
    read the customer spans), from the class's lines read again."""
    found = cut_part(part).summary() if part.cut_inputs else {}
    if found.get("first_period_known"):
        return found["first_period"]
    config = part.config
    folder, inputs = config.inputs.folder, config.inputs
    products = load_products(folder, inputs)[0]
    classes = class_map(products)
    raw = class_rows(load_raw_history(folder, inputs)[0], classes, part.product_class)
    spans = load_customer_spans(folder, inputs)[0]
    return input_cut.class_first_period(raw, products, classes, spans, config, part.product_class)


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
    settings=lambda part: cleaning_settings(part),
    group="history",
    ins=("raw_history", "products", "customer_spans", "shortages"),
))
