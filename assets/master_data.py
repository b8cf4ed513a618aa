"""Assets `products`, `customer_spans`, `adjustments`, `pins`, `shortages`: master data and planner input.

Each partition (cycle x product class) keeps the rows of its class's products;
the product master file says which class a product is in.
"""

import dagster as dg
import pandas as pd

from assets.common import rule_check, schema_check_spec, table_metadata, validate
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
    unknown_references,
)

PRODUCTS = "products"
CUSTOMER_SPANS = "customer_spans"
ADJUSTMENTS = "adjustments"
PINS = "pins"
SHORTAGES = "shortages"
REFERENCES_KNOWN = "references_known"


def _references_text(kind: str, blocking: bool) -> str:
    what = {
        CUSTOMER_SPANS: "every span's product is in the product master and every reference_customer has a span of "
        "the same product and site",
        SHORTAGES: "every shortage names a product and site that has customer spans",
        ADJUSTMENTS: "every adjustment names a product and site that has customer spans, and a measure of the config",
        PINS: "every pin names a customer with a span of its product and site, and a measure of the config",
    }[kind]
    verb = "Proves" if blocking else "Warns unless it holds:"
    after = "the cycle of the class stops before plan_measures" if blocking else "the cycle goes on without those rows"
    return (
        f"{verb} {what}. When it fails, {after}; the failing rows give file, row, column, value and what to do: "
        f"correct the {kind} file or the master data, and run the cycle again."
    )


def _references_check(kind: str, frame, products, spans, files, config, blocking: bool) -> dg.AssetCheckResult:
    file = files[0].path.name if files else ""
    failing = unknown_references(kind, frame, products, spans, tuple(config.measures), file=file)
    return rule_check(
        kind,
        REFERENCES_KNOWN,
        failing,
        what=_references_text(kind, blocking).split(". When")[0],
        severity=dg.AssetCheckSeverity.ERROR if blocking else dg.AssetCheckSeverity.WARN,
        what_to_do="; ".join(sorted(set(failing["what_to_do"]))) if len(failing) else "nothing",
    )


def _files(files) -> pd.DataFrame:
    return pd.DataFrame([{"file": str(f.path), "rows": f.rows, "sha256": f.sha256} for f in files])


def class_of_partition(context: dg.AssetExecutionContext, planning: PlanningConfigResource):
    """The narrowed config and the product -> class map of the product master file."""
    config = partition_config(context, planning.config)
    master, _ = load_products(config.inputs.folder, config.inputs)
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
    frame, files = load_products(config.inputs.folder, config.inputs)
    frame, check = validate(frame, Products, PRODUCTS, source=files[0].path.name)
    if check.passed:
        planning.config.check_classes_known(set(frame["product_class"]), where=str(files[0].path))
        frame = frame[frame["product_class"] == product_class]
    frame = frame.reset_index(drop=True)
    yield dg.Output(frame, metadata=table_metadata(frame, files=_files(files), product_class=product_class))
    yield check


@dg.asset(
    name=CUSTOMER_SPANS,
    group_name="master_data",
    partitions_def=cycle_class_partitions,
    kinds={"pandas", "duckdb"},
    check_specs=[
        schema_check_spec(CUSTOMER_SPANS, CustomerSpans),
        dg.AssetCheckSpec(REFERENCES_KNOWN, asset=CUSTOMER_SPANS, blocking=False, description=_references_text(CUSTOMER_SPANS, False)),
    ],
    description="Which customer buys which product at which site, from when to when, and its reference customer "
    "(the spans of the partition's class).",
)
def customer_spans(context: dg.AssetExecutionContext, planning: PlanningConfigResource):
    config, product_class, classes = class_of_partition(context, planning)
    spans, files = load_customer_spans(config.inputs.folder, config.inputs)
    products, _ = load_products(config.inputs.folder, config.inputs)
    mine = class_rows(spans, classes, product_class, keep_index=True)
    frame, check = validate(mine, CustomerSpans, CUSTOMER_SPANS, source=files[0].path.name)
    references = _references_check(CUSTOMER_SPANS, mine, products, spans, files, config, blocking=False)
    frame = frame.reset_index(drop=True)
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
    yield references


def _optional_input(
    name: str, loader, model, description: str, figures=lambda frame: {}, blocking: bool = False
) -> dg.AssetsDefinition:
    """An asset over an optional parent-grain input file (empty when the file is absent), filtered to the class.

    Its checks: the schema, and `references_known` (blocking for pins: a pin
    on an unknown customer cannot be kept).
    """

    @dg.asset(
        name=name,
        group_name="master_data",
        partitions_def=cycle_class_partitions,
        kinds={"pandas", "duckdb"},
        check_specs=[
            schema_check_spec(name, model),
            dg.AssetCheckSpec(REFERENCES_KNOWN, asset=name, blocking=blocking, description=_references_text(name, blocking)),
        ],
        description=description,
    )
    def _asset(context: dg.AssetExecutionContext, planning: PlanningConfigResource):
        config, product_class, classes = class_of_partition(context, planning)
        frame, files = loader(config.inputs.folder, config.inputs)
        mine = class_rows(frame, classes, product_class, keep_index=True)
        checked, check = validate(mine, model, name, source=files[0].path.name if files else None)
        products, _ = load_products(config.inputs.folder, config.inputs)
        spans, _ = load_customer_spans(config.inputs.folder, config.inputs)
        references = _references_check(name, mine, products, spans, files, config, blocking)
        checked = checked.reset_index(drop=True)
        yield dg.Output(checked, metadata=table_metadata(checked, files=_files(files), **figures(checked)))
        yield check
        yield references

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
    blocking=True,
)

shortages = _optional_input(
    SHORTAGES,
    load_shortages,
    Shortages,
    "Recorded supply shortages, one row per product x site and period that was short "
    "(optional shortages file; empty when absent). cleaned_history flags these periods.",
    figures=lambda frame: {"parents": int(frame.drop_duplicates(["product", "site"]).shape[0])},
)
