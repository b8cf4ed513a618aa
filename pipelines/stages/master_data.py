"""Master data: products, customer spans, planner adjustments, pins and supply shortages.

Loaded as text with blanks as missing, indexed by each line's `source_row`
(its 1-based data row), so a failing row is named by file and row. The
stage's pandera model parses the dates and numbers, so a bad cell shows up as
a failing row of the schema check instead of being guessed; a date-time with a
UTC offset keeps the date and time as written. A malformed line stops the read
with an error naming it (`pipelines.stages.inputs.read_text_table`).
`unknown_references` lists the rows that name a product, customer or measure
the master data or config do not hold.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from pipelines.config import InputsConfig
from pipelines.stages.inputs import InputFile, blanks_to_none, find_files, read_text_table, sha256
from pipelines.stages.plausible import normalize_dates

PRODUCT_COLUMNS = ("product", "product_class", "active_from", "active_to", "successor")
SPAN_COLUMNS = ("product", "site", "customer", "active_from", "active_to", "reference_customer")
# optional span columns for new customers: blank when the file lacks them
SPAN_OPTIONAL_COLUMNS = ("scale", "initial_share")
ADJUSTMENT_COLUMNS = ("measure", "product", "site", "period_start", "value")
SHORTAGE_COLUMNS = ("product", "site", "period_start")
PIN_COLUMNS = ("product", "site", "customer", "period_start", "measure", "value")


def _load(
    folder: Path,
    name: str,
    columns: tuple[str, ...],
    required: bool = True,
    optional: tuple[str, ...] = (),
    inputs: InputsConfig | None = None,
    dates: tuple[str, ...] = (),
) -> tuple[pd.DataFrame, list[InputFile]]:
    """The file `name` of `folder` as text (None for blank), indexed by `source_row`, its `dates` offsets dropped."""
    inputs = inputs or InputsConfig()
    paths = find_files(folder, name, required=required)
    if not paths:
        empty = pd.DataFrame({c: pd.Series(dtype=object) for c in columns + optional})
        return empty.rename_axis("source_row"), []
    path = paths[0]
    df = read_text_table(path, columns, optional, encoding=inputs.encoding, max_line_bytes=inputs.max_line_bytes)
    df = blanks_to_none(normalize_dates(df, dates))
    return df, [InputFile(path=path, rows=len(df), sha256=sha256(path))]


def load_products(folder: Path, inputs: InputsConfig | None = None) -> tuple[pd.DataFrame, list[InputFile]]:
    return _load(folder, "products", PRODUCT_COLUMNS, inputs=inputs, dates=("active_from", "active_to"))


def load_customer_spans(folder: Path, inputs: InputsConfig | None = None) -> tuple[pd.DataFrame, list[InputFile]]:
    return _load(folder, "customer_spans", SPAN_COLUMNS, optional=SPAN_OPTIONAL_COLUMNS, inputs=inputs, dates=("active_from", "active_to"))


def load_adjustments(folder: Path, inputs: InputsConfig | None = None) -> tuple[pd.DataFrame, list[InputFile]]:
    """Optional: an absent file gives an empty table."""
    return _load(folder, "adjustments", ADJUSTMENT_COLUMNS, required=False, inputs=inputs, dates=("period_start",))


def load_shortages(folder: Path, inputs: InputsConfig | None = None) -> tuple[pd.DataFrame, list[InputFile]]:
    """Optional: recorded supply shortages at product x site and period; an absent file gives an empty table."""
    return _load(folder, "shortages", SHORTAGE_COLUMNS, required=False, inputs=inputs, dates=("period_start",))


def class_rows(frame: pd.DataFrame, classes: pd.Series, product_class: str, keep_index: bool = False) -> pd.DataFrame:
    """The rows of `frame` whose product is in `product_class` (`classes`: product -> class of the master file).

    A row whose product is not in the master belongs to no class and is kept in
    every class, so the stage's schema or rule checks report it instead of it
    vanishing. `keep_index` keeps the frame's index (the file rows of master
    data), so a failing row can still be named.
    """
    cls = frame["product"].map(classes)
    rows = frame.loc[(cls == product_class) | cls.isna()]
    return rows if keep_index else rows.reset_index(drop=True)


def load_pins(folder: Path, inputs: InputsConfig | None = None) -> tuple[pd.DataFrame, list[InputFile]]:
    """Optional: leaf values a planner fixed, per measure and period; an absent file gives an empty table."""
    return _load(folder, "pins", PIN_COLUMNS, required=False, inputs=inputs, dates=("period_start",))


REFERENCE_COLUMNS = ["file", "row", "product", "site", "customer", "column", "value", "problem", "what_to_do"]


def unknown_references(
    kind: str, frame: pd.DataFrame, products: pd.DataFrame, spans: pd.DataFrame, measures: tuple[str, ...] = (), file: str = ""
) -> pd.DataFrame:
    """Rows of the input `kind` that name what the master data do not hold, one row per problem.

    `frame` is indexed by its file rows (`source_row`); `products` and `spans`
    are the whole master files (text, None for blank). Per input:

    - `customer_spans`: a product not in the product master; a
      `reference_customer` without a span of the same product and site.
    - `shortages`, `adjustments`: a product x site without any customer span
      (the record reaches no customer).
    - `pins`: a product x site x customer without a span.
    - `adjustments`, `pins`: a measure not in `measures` (config `measures`).

    Returns REFERENCE_COLUMNS (`row` is the 1-based data row; `customer` ''
    where the input has none), empty when every reference is known.
    """
    out = []

    def add(mask, column: str, problem: str, fix: str) -> None:
        mask = np.asarray(mask, dtype=bool)
        if not mask.any():
            return
        rows = frame.loc[mask]
        out.append(
            pd.DataFrame(
                {
                    "file": file,
                    "row": np.asarray(rows.index, dtype=np.int64),
                    "product": rows["product"].fillna("").astype(str).to_numpy(),
                    "site": rows["site"].fillna("").astype(str).to_numpy() if "site" in rows else "",
                    "customer": rows["customer"].fillna("").astype(str).to_numpy() if "customer" in rows else "",
                    "column": column,
                    "value": rows[column].fillna("").astype(str).to_numpy(),
                    "problem": problem,
                    "what_to_do": fix,
                }
            )
        )

    known_products = set(products["product"].dropna().astype(str)) if len(products) else set()
    span_leaves = pd.MultiIndex.from_frame(spans[["product", "site", "customer"]].fillna("").astype(str))
    span_parents = pd.MultiIndex.from_frame(spans[["product", "site"]].fillna("").astype(str))
    product = frame["product"].fillna("").astype(str)
    if kind == "customer_spans":
        add(
            (product != "") & ~product.isin(known_products),
            "product",
            "product not in the product master",
            "add the product to the products file, or correct the code",
        )
        ref = frame["reference_customer"]
        asked = ref.notna() & (ref.fillna("").astype(str) != "")
        ref_key = pd.MultiIndex.from_arrays([product, frame["site"].fillna("").astype(str), ref.fillna("").astype(str)])
        add(
            asked.to_numpy() & ~ref_key.isin(span_leaves),
            "reference_customer",
            "the reference customer has no customer span of this product and site",
            "name a customer of the same product and site, or leave reference_customer blank",
        )
        return _stack(out)
    parent = pd.MultiIndex.from_arrays([product, frame["site"].fillna("").astype(str)])
    if kind in ("shortages", "adjustments"):
        add(
            (product != "").to_numpy() & ~parent.isin(span_parents),
            "product",
            "no customer span of this product and site: the row reaches no customer",
            "correct product and site, or add the customer spans of this product and site",
        )
    if kind == "pins":
        leaf = pd.MultiIndex.from_arrays([product, frame["site"].fillna("").astype(str), frame["customer"].fillna("").astype(str)])
        add(
            (product != "").to_numpy() & ~leaf.isin(span_leaves),
            "customer",
            "no customer span of this product, site and customer: the pin cannot be kept",
            "correct the customer (or product and site), or add its customer span",
        )
    if kind in ("adjustments", "pins") and measures:
        measure = frame["measure"].fillna("").astype(str)
        add(
            (measure != "") & ~measure.isin(measures),
            "measure",
            f"not a measure of the config (measures: {', '.join(measures)})",
            "correct the measure name, or add the measure under measures in the planning config",
        )
    return _stack(out)


def _stack(pieces: list[pd.DataFrame]) -> pd.DataFrame:
    if not pieces:
        return pd.DataFrame({c: pd.Series(dtype=np.int64 if c == "row" else object) for c in REFERENCE_COLUMNS})
    return pd.concat(pieces, ignore_index=True).sort_values(["row", "column"], kind="stable").reset_index(drop=True)
