"""Stages `products` (+ `product_class_map`), `customer_spans`, `adjustments`, `pins`, `shortages`: master data
and planner input.

Loaded as text with blanks as missing, indexed by each line's `source_row`
(its 1-based data row), so a failing row is named by file and row (the run
names the file in `StageResult.sources`). The stage's pandera model parses the
dates and numbers, so a bad cell shows up as a failing row of the schema check
instead of being guessed; a date-time with a UTC offset keeps the date and time
as written. A malformed line stops the read with an error naming it
(`pipelines.engines.inputs.read_text_table`). `unknown_references` lists the
rows that name a product, customer or measure the master data or config do not
hold: the check `references_known` of each input but products.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import numpy as np
import pandas as pd
import pandera.errors

from pipelines.checks import REFERENCES_KNOWN
from pipelines.config_inputs import InputsConfig
from pipelines.engines.class_rows import InputSettings, class_map, class_rows, input_files, shard_rows
from pipelines.engines.inputs import InputFile, blanks_to_none, find_files, read_text_table, sha256
from pipelines.engines.plausible import normalize_dates
from pipelines.errors import ConfigError
from pipelines.results import CheckRows, Log, StageResult, quiet
from pipelines.schemas import Products
from pipelines.text_dtype import validate_table

PRODUCT_COLUMNS = ("product", "product_class", "active_from", "active_to", "successor")
# optional product columns: a grouping above the product (hierarchy.upper_levels, seasonal_group); blank when absent
PRODUCT_OPTIONAL_COLUMNS = ("product_family",)
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
    return _load(
        folder, "products", PRODUCT_COLUMNS, optional=PRODUCT_OPTIONAL_COLUMNS, inputs=inputs,
        dates=("active_from", "active_to"),
    )


def load_customer_spans(folder: Path, inputs: InputsConfig | None = None) -> tuple[pd.DataFrame, list[InputFile]]:
    dates = ("active_from", "active_to")
    return _load(folder, "customer_spans", SPAN_COLUMNS, optional=SPAN_OPTIONAL_COLUMNS, inputs=inputs, dates=dates)


def load_adjustments(folder: Path, inputs: InputsConfig | None = None) -> tuple[pd.DataFrame, list[InputFile]]:
    """Optional: an absent file gives an empty table."""
    return _load(folder, "adjustments", ADJUSTMENT_COLUMNS, required=False, inputs=inputs, dates=("period_start",))


def load_shortages(folder: Path, inputs: InputsConfig | None = None) -> tuple[pd.DataFrame, list[InputFile]]:
    """Optional: recorded supply shortages at product x site and period; an absent file gives an empty table."""
    return _load(folder, "shortages", SHORTAGE_COLUMNS, required=False, inputs=inputs, dates=("period_start",))


def load_pins(folder: Path, inputs: InputsConfig | None = None) -> tuple[pd.DataFrame, list[InputFile]]:
    """Optional: leaf values a planner fixed, per measure and period; an absent file gives an empty table."""
    return _load(folder, "pins", PIN_COLUMNS, required=False, inputs=inputs, dates=("period_start",))


# ----------------------------------------------------------------- stage runs
def run_products(settings: InputSettings, log: Log = quiet) -> StageResult:
    """The partition's class's rows of the product master, and the whole master's product -> class map.

    A master that fails its schema is passed on whole, so the schema check
    lists its rows; otherwise a class the config does not know stops the run.
    """
    frame, files = load_products(settings.folder, settings.inputs)
    master = frame[frame["product"].notna()].drop_duplicates("product")[["product", "product_class"]]
    try:
        validate_table(Products, frame)
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
        mine = shard_rows(frame[frame["product_class"] == settings.product_class], settings.shard)
    figures = {"files": input_files(files), "product_class": settings.product_class}
    return StageResult(
        outputs={"products": mine, "product_class_map": master.reset_index(drop=True)},
        metadata={"products": figures, "product_class_map": {"classes": int(master["product_class"].nunique())}},
        sources={"products": files[0].path.name},
    )


def class_input_run(name: str, loader: Callable, figures: Callable[[pd.DataFrame], dict] = lambda frame: {}):
    """The run of an input asset over one file: the rows of the partition's class (`class_rows`), and the
    check `references_known` over them (`unknown_references`; products from `product_class_map`, spans from
    the whole customer spans file)."""

    def run(product_class_map: pd.DataFrame, settings: InputSettings, log: Log = quiet) -> StageResult:
        frame, files = loader(settings.folder, settings.inputs)
        mine = class_rows(
            frame, class_map(product_class_map), settings.product_class, keep_index=True, shard=settings.shard
        )
        spans = frame if name == "customer_spans" else load_customer_spans(settings.folder, settings.inputs)[0]
        file = files[0].path.name if files else None
        failing = unknown_references(name, mine, product_class_map, spans, settings.measures, file=file or "")
        advice = "; ".join(sorted(set(failing["what_to_do"]))) if len(failing) else "nothing"
        return StageResult(
            outputs={name: mine},
            metadata={name: {"files": input_files(files), **figures(mine)}},
            checks={REFERENCES_KNOWN: CheckRows(failing, {"what_to_do": advice})},
            sources={name: file},
        )

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


# ----------------------------------------------------------------- references
REFERENCE_COLUMNS = ["file", "row", "product", "site", "customer", "column", "value", "problem", "what_to_do"]


def unknown_references(
    kind: str,
    frame: pd.DataFrame,
    products: pd.DataFrame,
    spans: pd.DataFrame,
    measures: tuple[str, ...] = (),
    file: str = "",
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
        site, customer = frame["site"].fillna("").astype(str), frame["customer"].fillna("").astype(str)
        leaf = pd.MultiIndex.from_arrays([product, site, customer])
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
