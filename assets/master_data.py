"""Assets `products` (+ `product_class_map`), `customer_spans`, `adjustments`, `pins`, `shortages`: master data
and planner input.

Each partition (cycle x product class) keeps the rows of its class's products;
the product master, read once by `products`, says which class a product is in
(`product_class_map`), and the other inputs depend on it. Each input but
products also carries `references_known` (pipelines.checks): its rows name
only products, customers and measures the master data and config hold.
"""

import dataclasses
from pathlib import Path

from assets.factory import StageAsset, Table, stage_asset
from pipelines.engines.class_rows import InputSettings
from pipelines.input_cut import CutPart
from pipelines.shards import Shard, successor_ends
from pipelines.stages import master_data as stage
from pipelines.store.layout import DEFAULT_SHARD

PRODUCTS = "products"
PRODUCT_CLASS_MAP = "product_class_map"
CUSTOMER_SPANS = "customer_spans"
ADJUSTMENTS = "adjustments"
PINS = "pins"
SHORTAGES = "shortages"


def input_settings(part) -> InputSettings:
    config = part.config
    return InputSettings(
        config.inputs.folder, part.product_class, tuple(part.full.product_classes), str(part.full.source),
        inputs=config.inputs, measures=tuple(config.measures), shard=with_successors(part.shard, config),
        cut=cut_part(part),
    )


def cut_part(part) -> CutPart | None:
    """The partition's part of the cycle's history cut (None when the partition reads the whole history)."""
    if not part.cut_inputs:
        return None
    shard = DEFAULT_SHARD if part.shard is None else part.shard.name
    return CutPart(Path(part.config.store.path), part.full, part.cycle, part.product_class, shard)


def with_successors(shard: Shard | None, config) -> Shard | None:
    """A shard that hashes each product by the end of its successor chain (read from the product master)."""
    if shard is None:
        return None
    return dataclasses.replace(shard, alias=successor_ends(stage.load_products(config.inputs.folder, config.inputs)[0]))


def _input(name: str, run, description: str):
    return stage_asset(
        StageAsset(
            tables=(Table(name, description),),
            run=run,
            settings=input_settings,
            group="master_data",
            ins=(PRODUCT_CLASS_MAP,),
        )
    )


products = stage_asset(
    StageAsset(
        tables=(
            Table(
                PRODUCTS, "Product master of the partition's class: class, active span and successor of each product."
            ),
            Table(
                PRODUCT_CLASS_MAP,
                "The class of every product of the product master file, read once for the other inputs.",
            ),
        ),
        run=stage.run_products,
        settings=input_settings,
        group="master_data",
    )
)

customer_spans = _input(
    CUSTOMER_SPANS,
    stage.run_customer_spans,
    "Which customer buys which product at which site, from when to when, and its reference customer "
    "(the spans of the partition's class).",
)

adjustments = _input(
    ADJUSTMENTS,
    stage.run_adjustments,
    "Parent-grain values of the plan's input measures, e.g. prices, promotion uplifts and planner "
    "adjustments (optional adjustments file; empty when absent). plan_measures splits them to the leaf.",
)

pins = _input(
    PINS,
    stage.run_pins,
    "Leaf values a planner fixed per measure and period (optional pins file; empty when absent): "
    "plan_measures keeps them and splits the rest of the parent over the other customers.",
)

shortages = _input(
    SHORTAGES,
    stage.run_shortages,
    "Recorded supply shortages, one row per product x site and period that was short "
    "(optional shortages file; empty when absent). cleaned_history flags these periods.",
)
