"""The Dagster benchmark's inputs in slices: one input folder of independent slices, classes cut into shards.

`benchmarks/cycle_dagster.py --slices N` writes the scenario as N slices of
leaves / N leaf series each, generated one after another, each in a forked
child (so no process holds more than one slice's lines): slice i is
`cycle_scenario.generate` with seed + i, its products renamed `<code>-<i>`
(slice 0 keeps its names, so one slice is the plain scenario) wherever a
product code appears (history, products and successors, customer spans,
adjustments, pins, shortages; a bad line's product that is no product stays as
written). Its history goes to `history_<i>_<year>.csv` files beside the other
slices' in the one input folder; the master data and planner input are
appended to one CSV file each. Sites and the customer pool are shared by
the slices, as one company's are; parents never are.

With a scenario cache (`cycle_dagster.py --scenario-cache DIR`,
`benchmarks/scenario_cache.py`) each slice is read from the cache (leaves / N
leaves, its seed) instead of generated: the same lines, written in a fraction
of the time.

`shard_counts` cuts each class into ceil(its leaves / `shard_leaves`) shards
(`scale: {shards: n}` on the class): how a team would run more leaves than
one process holds, each shard a partition of its own, K at a time.
"""

from __future__ import annotations

import math
import multiprocessing
import time
from pathlib import Path

import pandas as pd
from cycle_scenario import generate
from scenario_cache import cached

PRODUCT_COLUMNS = {"raw": ("product",), "products": ("product", "successor"), "spans": ("product",),
                   "adjustments": ("product",), "pins": ("product",), "shortages": ("product",)}
MASTER = {"products": "products", "spans": "customer_spans", "adjustments": "adjustments", "pins": "pins",
          "shortages": "shortages"}


def renamed(frame: pd.DataFrame, columns: tuple[str, ...], known: set, suffix: str) -> pd.DataFrame:
    """`frame` with every known product code in `columns` given `suffix`."""
    if not suffix:
        return frame
    frame = frame.copy()
    for column in columns:
        values = frame[column]
        mine = values.isin(known).to_numpy()
        frame[column] = values.where(~mine, values.astype(object).astype(str) + suffix)
    return frame


def write_slice(index: int, leaves: int, seed: int, periods: int, horizon: int, inputs: Path,
                cache: Path | None = None) -> dict:
    """Slice `index` of the scenario into `inputs` (history files of its own, master data appended); its facts
    and its leaves per class. With `cache` (a folder of `scenario_cache`), the slice's scenario is read from it
    (generated and written there first when missing)."""
    scen = generate(leaves, seed, periods, None, horizon) if cache is None else cached(
        leaves, seed, periods, horizon, cache)[0]
    known, suffix = set(scen.products["product"].dropna()), f"-{index}" if index else ""
    raw = renamed(scen.raw, PRODUCT_COLUMNS["raw"], known, suffix)
    for name, part in raw.groupby("source_file", sort=True):
        target = inputs / f"history_{index}_{name.removeprefix('history_')}"
        part.drop(columns=["source_file", "source_row"]).to_csv(target, index=False, lineterminator="\n")
    for attr, file in MASTER.items():
        frame = renamed(getattr(scen, attr), PRODUCT_COLUMNS[attr], known, suffix)
        frame.to_csv(inputs / f"{file}.csv", index=False, lineterminator="\n", mode="a" if index else "w",
                     header=not index)
    of_class = scen.spans["product"].map(scen.products.drop_duplicates("product").set_index("product")["product_class"])
    return {**scen.facts, "leaves_per_class": {str(k): int(v) for k, v in of_class.value_counts().items()}}


def forked(what: str, make, *args) -> dict:
    """`make(*args)` (a dict of facts) in a forked child process, so the memory it needs is not this one's;
    SystemExit naming `what` when it fails."""
    context = multiprocessing.get_context("fork")
    queue = context.SimpleQueue()
    child = context.Process(target=_child, args=(queue, make, *args))
    child.start()
    facts = queue.get()
    child.join()
    if child.exitcode != 0 or "error" in facts:
        raise SystemExit(f"{what} failed: {facts.get('error', child.exitcode)}")
    return facts


def _child(queue, make, *args) -> None:
    try:
        queue.put(make(*args))
    except Exception as err:  # reported by the parent
        queue.put({"error": f"{type(err).__name__}: {err}"})
        raise


def write_slices(leaves: int, slices: int, seed: int, periods: int, horizon: int, inputs: Path,
                 cache: Path | None = None) -> dict:
    """Every slice, one forked child after another (`cache`: read through the scenario cache); the facts summed
    over the slices."""
    started = time.perf_counter()
    inputs.mkdir(parents=True, exist_ok=True)
    size, total = leaves // slices, {}
    for i in range(slices):
        facts = forked(f"generating slice {i}", write_slice, i, size, seed + i, periods, horizon, inputs, cache)
        print(f"  slice {i + 1}/{slices} (seed {seed + i}, {size:,} leaves) written, "
              f"{time.perf_counter() - started:.0f} s so far", flush=True)
        for key, value in facts.items():
            if key == "leaves_per_class":
                counts = total.setdefault(key, {})
                for k, v in value.items():
                    counts[k] = counts.get(k, 0) + v
            elif isinstance(value, int | float):
                total[key] = total.get(key, 0) + value
    total["slices"], total["generate_s"] = slices, round(time.perf_counter() - started, 2)
    return total


def shard_counts(leaves_per_class: dict[str, int], shard_leaves: int) -> dict[str, int]:
    """Shards per class: ceil(the class's leaves / shard_leaves), at least 1."""
    return {k: max(1, math.ceil(v / shard_leaves)) for k, v in leaves_per_class.items()}
