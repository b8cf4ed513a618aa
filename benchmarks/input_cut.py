"""The history read by every partition against the history cut once per cycle, at a size where it shows.

    nice .venv/bin/python benchmarks/input_cut.py [--lines 2000000] [--classes 4] [--shards 4] [--folder DIR]
        [--cut-only]

Writes (once per folder) a seeded history of `--lines` lines
(`benchmarks/reader.py`'s `write_history`: 2,000 products x 3 sites x 2,000
customers over three years), a product master putting product i in class
i mod `--classes`, and customer spans for the first 20 customers of each
product and site. Every class is cut into `--shards` shards, so a cycle has
classes x shards partitions. Then, in this process, times what the
partitions of one cycle do to get their history lines:

    whole   each partition reads the whole history and keeps its rows
            (`load_raw_history` + `class_rows`, as `raw_history` without the cut),
            and reads its class's lines again for the class's first trusted
            period (`assets.cleaned_history.class_first_period` without the cut)
    cut     `pipelines.input_cut.ensure_cut` once, then each partition reads
            its part and the class's summary

and checks that both give every partition the same rows. Prints seconds and
the load average before and after each (the machine is shared).

`--cut-only`: the cut alone (`ensure_cut`), in a forked child process of its
own, with the child's peak RSS (`ru_maxrss`) beside its seconds: what the
cutting partition's process needs. The child starts from this process (the
imports, a few hundred MB), so its peak counts them.
"""

from __future__ import annotations

import argparse
import multiprocessing
import os
import resource
import shutil
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd
import yaml

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from benchmarks.reader import write_history  # noqa: E402
from pipelines.config import parse_config  # noqa: E402

CYCLE = "2026-11-30"


def write_inputs(folder: Path, lines: int, classes: int) -> None:
    folder.mkdir(parents=True, exist_ok=True)
    if not (folder / "history.csv").exists():
        write_history(folder / "history.csv", lines)
    products = [f"P{i:05d}" for i in range(2000)]
    pd.DataFrame({"product": products, "product_class": [f"class_{i % classes}" for i in range(2000)],
                  "active_from": "", "active_to": "", "successor": "", "product_family": "all"}).to_csv(
        folder / "products.csv", index=False)
    keys = pd.MultiIndex.from_product([products, [f"SITE-{s}" for s in (1, 2, 3)], [f"C{c:05d}" for c in range(20)]])
    spans = keys.to_frame(index=False, name=["product", "site", "customer"])
    for column in ("active_from", "active_to", "reference_customer", "scale", "initial_share"):
        spans[column] = ""
    spans.to_csv(folder / "customer_spans.csv", index=False)


def config_of(folder: Path, store: Path, classes: int, shards: int):
    data = yaml.safe_load((ROOT / "config" / "planning.weekly.yaml").read_text())
    template = {**data["product_classes"]["consumables"], "seasonality": "none", "scale": {"shards": shards}}
    data["product_classes"] = {f"class_{i}": dict(template) for i in range(classes)}
    data["inputs"]["folder"] = str(folder)
    data["store"]["path"] = str(store)
    data["hierarchy"] = {"upper_levels": []}
    return parse_config(data, ROOT / "config" / "planning.weekly.yaml")


def whole(config) -> dict[str, pd.DataFrame]:
    """Each partition as without the cut: the whole history read, its rows kept, the class's first period."""
    from assets.factory import Partition
    from assets.master_data import with_successors
    from pipelines.engines.class_rows import class_map, class_rows
    from pipelines.engines.history_files import load_raw_history
    from pipelines.input_cut import class_first_period
    from pipelines.partitions import narrow_config
    from pipelines.shards import partition_classes, shard_of, split_class_key
    from pipelines.stages.master_data import load_customer_spans, load_products

    found = {}
    inputs = config.inputs
    for key in partition_classes(config):
        name = split_class_key(key)[0]
        part = Partition(narrow_config(config, CYCLE, key), config, CYCLE, name, shard_of(config, key))
        products = load_products(inputs.folder, inputs)[0]
        classes = class_map(products)
        found[key] = class_rows(load_raw_history(inputs.folder, inputs)[0], classes, name,
                                shard=with_successors(part.shard, part.config))
        raw = class_rows(load_raw_history(inputs.folder, inputs)[0], classes, name)  # the class's first period
        class_first_period(raw, products, classes, load_customer_spans(inputs.folder, inputs)[0], part.config, name)
    return found


def cut(config) -> dict[str, pd.DataFrame]:
    from pipelines.input_cut import CutPart, ensure_cut
    from pipelines.shards import partition_classes, split_class_key

    ensure_cut(config.store.path, config, CYCLE)
    found = {}
    for key in partition_classes(config):
        part = CutPart(Path(config.store.path), config, CYCLE, *split_class_key(key))
        found[key] = part.lines()[0]
        part.summary()
    return found


def cut_alone(config) -> tuple[float, float]:
    """`ensure_cut` in a forked child: its seconds and its peak RSS in MB."""
    def child(pipe) -> None:
        from pipelines.input_cut import ensure_cut

        started = time.monotonic()
        ensure_cut(config.store.path, config, CYCLE)
        pipe.send((time.monotonic() - started, resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024))

    context = multiprocessing.get_context("fork")
    here, there = context.Pipe()
    process = context.Process(target=child, args=(there,))
    process.start()
    seconds, peak = here.recv()
    process.join()
    return seconds, peak


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--lines", type=int, default=2_000_000)
    parser.add_argument("--classes", type=int, default=4)
    parser.add_argument("--shards", type=int, default=4)
    parser.add_argument("--folder", type=Path, default=None, help="inputs folder (kept; default a temporary one)")
    parser.add_argument("--cut-only", action="store_true", help="the cut alone, in a child: seconds and peak RSS")
    args = parser.parse_args(argv)
    tmp = Path(tempfile.mkdtemp(prefix="input-cut-"))
    folder = args.folder or tmp / "inputs"
    try:
        write_inputs(folder, args.lines, args.classes)
        config = config_of(folder, tmp / "store", args.classes, args.shards)
        partitions = args.classes * args.shards
        print(f"{args.lines:,} history lines, {args.classes} classes x {args.shards} shards = {partitions} "
              f"partitions, {os.cpu_count()} cores; load average (1, 5, 15 min) before -> after")
        if args.cut_only:
            before = os.getloadavg()
            seconds, peak = cut_alone(config)
            size = (folder / "history.csv").stat().st_size
            print(f"cut    {seconds:8.1f} s  peak RSS {peak:,.0f} MB (history {size / 2**20:,.0f} MB)  load "
                  f"{np.round(before, 1)} -> {np.round(os.getloadavg(), 1)}")
            return 0
        results = {}
        for name, how in (("whole", whole), ("cut", cut)):
            before, started = os.getloadavg(), time.monotonic()
            results[name] = how(config)
            seconds = time.monotonic() - started
            print(f"{name:6s} {seconds:8.1f} s  load {np.round(before, 1)} -> {np.round(os.getloadavg(), 1)}")
        for key, frame in results["whole"].items():
            pd.testing.assert_frame_equal(frame, results["cut"][key], check_exact=True)
        print(f"every partition's rows identical ({sum(len(f) for f in results['cut'].values()):,} rows in all)")
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
