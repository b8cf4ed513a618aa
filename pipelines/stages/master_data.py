"""Master data: products, customer spans, planner adjustments, pins and supply shortages.

Loaded as text with blanks as missing; the stage's pandera model parses the
dates and numbers, so a bad cell shows up as a failing row of the schema check
instead of being guessed.
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd

from pipelines.engines.inputs import InputFile, blanks_to_none, find_files, read_text_table, sha256

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


def class_rows(frame: pd.DataFrame, classes: pd.Series, product_class: str) -> pd.DataFrame:
    """The rows of `frame` whose product is in `product_class` (`classes`: product -> class of the master file).

    A row whose product is not in the master belongs to no class and is kept in
    every class, so the stage's schema or rule checks report it instead of it
    vanishing.
    """
    cls = frame["product"].map(classes)
    return frame.loc[(cls == product_class) | cls.isna()].reset_index(drop=True)


def load_pins(folder: Path) -> tuple[pd.DataFrame, list[InputFile]]:
    """Optional: leaf values a planner fixed, per measure and period; an absent file gives an empty table."""
    return _load(folder, "pins", PIN_COLUMNS, required=False)
