"""Stages `products` (+ `product_class_map`), `customer_spans`, `adjustments`, `pins`, `shortages`: master data
and planner input.

Loaded as text with blanks as missing; the stage's pandera model parses the
dates and numbers, so a bad cell shows up as a failing row of the schema check
instead of being guessed.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import pandas as pd
import pandera.errors

from pipelines.engines.class_rows import InputSettings, class_map, class_rows, input_files
from pipelines.engines.inputs import InputFile, blanks_to_none, find_files, read_text_table, sha256
from pipelines.errors import ConfigError
from pipelines.results import Log, StageResult, quiet
from pipelines.schemas import Products

PRODUCT_COLUMNS = ("product", "product_class", "active_from", "active_to", "successor")
SPAN_COLUMNS = ("product", "site", "customer", "active_from", "active_to", "reference_customer")
# optional span columns for new customers: blank when the file lacks them
SPAN_OPTIONAL_COLUMNS = ("scale", "initial_share")
ADJUSTMENT_COLUMNS = ("measure", "product", "site", "period_start", "value")
SHORTAGE_COLUMNS = ("product", "site", "period_start")
PIN_COLUMNS = ("product", "site", "customer", "period_start", "measure", "value")


def _load(
    folder: Path, name: str, columns: tuple[str, ...], required: bool = True, optional: tuple[str, ...] = ()
) -> tuple[pd.DataFrame, list[InputFile]]:
    paths = find_files(folder, name, required=required)
    if not paths:
        return pd.DataFrame({c: pd.Series(dtype=object) for c in columns + optional}), []
    path = paths[0]
    df = blanks_to_none(read_text_table(path, columns, optional))
    return df, [InputFile(path=path, rows=len(df), sha256=sha256(path))]


def load_products(folder: Path) -> tuple[pd.DataFrame, list[InputFile]]:
    return _load(folder, "products", PRODUCT_COLUMNS)


def load_customer_spans(folder: Path) -> tuple[pd.DataFrame, list[InputFile]]:
    return _load(folder, "customer_spans", SPAN_COLUMNS, optional=SPAN_OPTIONAL_COLUMNS)


def load_adjustments(folder: Path) -> tuple[pd.DataFrame, list[InputFile]]:
    """Optional: an absent file gives an empty table."""
    return _load(folder, "adjustments", ADJUSTMENT_COLUMNS, required=False)


def load_shortages(folder: Path) -> tuple[pd.DataFrame, list[InputFile]]:
    """Optional: recorded supply shortages at product x site and period; an absent file gives an empty table."""
    return _load(folder, "shortages", SHORTAGE_COLUMNS, required=False)


def load_pins(folder: Path) -> tuple[pd.DataFrame, list[InputFile]]:
    """Optional: leaf values a planner fixed, per measure and period; an absent file gives an empty table."""
    return _load(folder, "pins", PIN_COLUMNS, required=False)


# ----------------------------------------------------------------- stage runs
def run_products(settings: InputSettings, log: Log = quiet) -> StageResult:
    """The partition's class's rows of the product master, and the whole master's product -> class map.

    A master that fails its schema is passed on whole, so the schema check
    lists its rows; otherwise a class the config does not know stops the run.
    """
    frame, files = load_products(settings.folder)
    master = frame[frame["product"].notna()].drop_duplicates("product")[["product", "product_class"]]
    try:
        Products.validate(frame, lazy=True)
    except pandera.errors.SchemaErrors:
        mine = frame
    else:
        unknown = sorted(set(frame["product_class"]) - set(settings.known_classes))
        if unknown:
            raise ConfigError(
                f"{settings.source}: product_classes does not define {unknown}, used in {files[0].path}; "
                f"valid classes are {sorted(settings.known_classes)}. Add a section for each "
                f"under product_classes, or correct the product_class column."
            )
        mine = frame[frame["product_class"] == settings.product_class].reset_index(drop=True)
    figures = {"files": input_files(files), "product_class": settings.product_class}
    return StageResult(
        outputs={"products": mine, "product_class_map": master.reset_index(drop=True)},
        metadata={"products": figures, "product_class_map": {"classes": int(master["product_class"].nunique())}},
    )


def class_input_run(name: str, loader: Callable, figures: Callable[[pd.DataFrame], dict] = lambda frame: {}):
    """The run of an input asset over one file: the rows of the partition's class (`class_rows`)."""

    def run(product_class_map: pd.DataFrame, settings: InputSettings, log: Log = quiet) -> StageResult:
        frame, files = loader(settings.folder)
        mine = class_rows(frame, class_map(product_class_map), settings.product_class)
        return StageResult(outputs={name: mine}, metadata={name: {"files": input_files(files), **figures(mine)}})

    run.__name__ = f"run_{name}"
    return run


run_customer_spans = class_input_run(
    "customer_spans",
    load_customer_spans,
    lambda f: {
        "with_end": int(pd.notna(f["active_to"]).sum()),
        "with_reference": int(pd.notna(f["reference_customer"]).sum()),
    },
)
run_adjustments = class_input_run("adjustments", load_adjustments)
run_pins = class_input_run(
    "pins", load_pins, lambda f: {"pins_by_measure": f.groupby("measure").size().rename("pins").reset_index()}
)
run_shortages = class_input_run(
    "shortages", load_shortages, lambda f: {"parents": int(f.drop_duplicates(["product", "site"]).shape[0])}
)
