"""Assets `products`, `customer_spans`, `adjustments`, `pins`, `shortages`: master data and planner input."""

import dagster as dg
import pandas as pd

from assets.common import schema_check_spec, table_metadata, validate
from pipelines.resources import PlanningConfigResource
from pipelines.schemas import Adjustments, CustomerSpans, Pins, Products, Shortages
from pipelines.stages.master_data import load_adjustments, load_customer_spans, load_pins, load_products, load_shortages

PRODUCTS = "products"
CUSTOMER_SPANS = "customer_spans"
ADJUSTMENTS = "adjustments"
SHORTAGES = "shortages"
PINS = "pins"


def _files(files) -> pd.DataFrame:
    return pd.DataFrame([{"file": str(f.path), "rows": f.rows, "sha256": f.sha256} for f in files])


@dg.asset(
    name=PRODUCTS,
    group_name="master_data",
    kinds={"pandas", "duckdb"},
    check_specs=[schema_check_spec(PRODUCTS, Products)],
    description="Product master: class, active span and successor of each product.",
)
def products(context: dg.AssetExecutionContext, planning: PlanningConfigResource):
    config = planning.config
    frame, files = load_products(config.inputs.folder)
    frame, check = validate(frame, Products, PRODUCTS)
    if check.passed:
        config.check_classes_known(set(frame["product_class"]), where=str(files[0].path))
    by_class = frame.groupby("product_class").size().rename("products").reset_index()
    yield dg.Output(frame, metadata=table_metadata(frame, files=_files(files), products_per_class=by_class))
    yield check


@dg.asset(
    name=CUSTOMER_SPANS,
    group_name="master_data",
    kinds={"pandas", "duckdb"},
    check_specs=[schema_check_spec(CUSTOMER_SPANS, CustomerSpans)],
    description="Which customer buys which product at which site, from when to when, and its reference customer.",
)
def customer_spans(context: dg.AssetExecutionContext, planning: PlanningConfigResource):
    frame, files = load_customer_spans(planning.config.inputs.folder)
    frame, check = validate(frame, CustomerSpans, CUSTOMER_SPANS)
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


@dg.asset(
    name=ADJUSTMENTS,
    group_name="master_data",
    kinds={"pandas", "duckdb"},
    check_specs=[schema_check_spec(ADJUSTMENTS, Adjustments)],
    description="Parent-grain values of the plan's input measures, e.g. prices, promotion uplifts and planner "
    "adjustments (optional adjustments file; empty when absent). plan_measures splits them to the leaf.",
)
def adjustments(context: dg.AssetExecutionContext, planning: PlanningConfigResource):
    frame, files = load_adjustments(planning.config.inputs.folder)
    frame, check = validate(frame, Adjustments, ADJUSTMENTS)
    yield dg.Output(frame, metadata=table_metadata(frame, files=_files(files)))
    yield check


@dg.asset(
    name=PINS,
    group_name="master_data",
    kinds={"pandas", "duckdb"},
    check_specs=[schema_check_spec(PINS, Pins)],
    description="Leaf values a planner fixed per measure and period (optional pins file; empty when absent): "
    "plan_measures keeps them and splits the rest of the parent over the other customers.",
)
def pins(context: dg.AssetExecutionContext, planning: PlanningConfigResource):
    frame, files = load_pins(planning.config.inputs.folder)
    frame, check = validate(frame, Pins, PINS)
    by_measure = frame.groupby("measure").size().rename("pins").reset_index()
    yield dg.Output(frame, metadata=table_metadata(frame, files=_files(files), pins_by_measure=by_measure))
    yield check


@dg.asset(
    name=SHORTAGES,
    group_name="master_data",
    kinds={"pandas", "duckdb"},
    check_specs=[schema_check_spec(SHORTAGES, Shortages)],
    description="Recorded supply shortages, one row per product x site and period that was short "
    "(optional shortages file; empty when absent). cleaned_history flags these periods.",
)
def shortages(context: dg.AssetExecutionContext, planning: PlanningConfigResource):
    frame, files = load_shortages(planning.config.inputs.folder)
    frame, check = validate(frame, Shortages, SHORTAGES)
    yield dg.Output(
        frame,
        metadata=table_metadata(
            frame,
            files=_files(files),
            parents=int(frame.drop_duplicates(["product", "site"]).shape[0]),
        ),
    )
    yield check
