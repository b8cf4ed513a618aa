"""Assets `products`, `customer_spans`, `adjustments`, `pins`, `shortages`: master data and planner input.

Each partition (cycle x product class) keeps the rows of its class's products;
the product master file says which class a product is in.
"""

import dagster as dg
import pandas as pd

from assets.common import schema_check_spec, table_metadata, validate
from pipelines.partitions import cycle_class_partitions, partition_config
from pipelines.resources import PlanningConfigResource
from pipelines.schemas import Adjustments, CustomerSpans, Pins, Products, Shortages
from pipelines.stages.master_data import (
    class_rows,
    load_adjustments,
    load_customer_spans,
    load_pins,
    load_products,
    load_shortages,
)

PRODUCTS = "products"
CUSTOMER_SPANS = "customer_spans"
ADJUSTMENTS = "adjustments"
PINS = "pins"
SHORTAGES = "shortages"


def _files(files) -> pd.DataFrame:
    return pd.DataFrame([{"file": str(f.path), "rows": f.rows, "sha256": f.sha256} for f in files])


def class_of_partition(context: dg.AssetExecutionContext, planning: PlanningConfigResource):
    """The narrowed config and the product -> class map of the product master file."""
    config = partition_config(context, planning.config)
    master, _ = load_products(config.inputs.folder)
    return config, next(iter(config.product_classes)), master.drop_duplicates("product").set_index("product")["product_class"]


@dg.asset(
    name=PRODUCTS,
    group_name="master_data",
    partitions_def=cycle_class_partitions,
    kinds={"pandas", "duckdb"},
    check_specs=[schema_check_spec(PRODUCTS, Products)],
    description="Product master of the partition's class: class, active span and successor of each product.",
)
def products(context: dg.AssetExecutionContext, planning: PlanningConfigResource):
    config = partition_config(context, planning.config)
    product_class = next(iter(config.product_classes))
    frame, files = load_products(config.inputs.folder)
    frame, check = validate(frame, Products, PRODUCTS)
    if check.passed:
        planning.config.check_classes_known(set(frame["product_class"]), where=str(files[0].path))
        frame = frame[frame["product_class"] == product_class].reset_index(drop=True)
    yield dg.Output(frame, metadata=table_metadata(frame, files=_files(files), product_class=product_class))
    yield check


@dg.asset(
    name=CUSTOMER_SPANS,
    group_name="master_data",
    partitions_def=cycle_class_partitions,
    kinds={"pandas", "duckdb"},
    check_specs=[schema_check_spec(CUSTOMER_SPANS, CustomerSpans)],
    description="Which customer buys which product at which site, from when to when, and its reference customer "
    "(the spans of the partition's class).",
)
def customer_spans(context: dg.AssetExecutionContext, planning: PlanningConfigResource):
    config, product_class, classes = class_of_partition(context, planning)
    frame, files = load_customer_spans(config.inputs.folder)
    frame, check = validate(class_rows(frame, classes, product_class), CustomerSpans, CUSTOMER_SPANS)
    yield dg.Output(
        frame,
        metadata=table_metadata(
            frame,
            files=_files(files),
            with_end=int(pd.notna(frame["active_to"]).sum()),
            with_reference=int(pd.notna(frame["reference_customer"]).sum()),
        ),
    )
    yield check


def _optional_input(name: str, loader, model, description: str, figures=lambda frame: {}) -> dg.AssetsDefinition:
    """An asset over an optional parent-grain input file (empty when the file is absent), filtered to the class."""

    @dg.asset(
        name=name,
        group_name="master_data",
        partitions_def=cycle_class_partitions,
        kinds={"pandas", "duckdb"},
        check_specs=[schema_check_spec(name, model)],
        description=description,
    )
    def _asset(context: dg.AssetExecutionContext, planning: PlanningConfigResource):
        config, product_class, classes = class_of_partition(context, planning)
        frame, files = loader(config.inputs.folder)
        frame, check = validate(class_rows(frame, classes, product_class), model, name)
        yield dg.Output(frame, metadata=table_metadata(frame, files=_files(files), **figures(frame)))
        yield check

    return _asset


adjustments = _optional_input(
    ADJUSTMENTS,
    load_adjustments,
    Adjustments,
    "Parent-grain values of the plan's input measures, e.g. prices, promotion uplifts and planner "
    "adjustments (optional adjustments file; empty when absent). plan_measures splits them to the leaf.",
)

pins = _optional_input(
    PINS,
    load_pins,
    Pins,
    "Leaf values a planner fixed per measure and period (optional pins file; empty when absent): "
    "plan_measures keeps them and splits the rest of the parent over the other customers.",
    figures=lambda frame: {"pins_by_measure": frame.groupby("measure").size().rename("pins").reset_index()},
)

shortages = _optional_input(
    SHORTAGES,
    load_shortages,
    Shortages,
    "Recorded supply shortages, one row per product x site and period that was short "
    "(optional shortages file; empty when absent). cleaned_history flags these periods.",
    figures=lambda frame: {"parents": int(frame.drop_duplicates(["product", "site"]).shape[0])},
)
