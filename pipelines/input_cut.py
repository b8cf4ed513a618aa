"""The history cut once per cycle: one Parquet part per (class, shard) in the store, read by each partition.

Without the cut every partition (cycle x class, or a shard of a class) would
read the whole history and keep its own lines, and a shard would read its
class's lines again for the class's first trusted period. The first
partition of a cycle that needs the history (`ensure_cut`) reads it once and
writes, under `<store>/cut/cycle=<c>/<fingerprint>/`:

    class=<k>/shard=<s>.parquet   the partition's lines, as `class_rows` keeps them
    summary.json                  files read, line counts, each class's first trusted period

Every later partition reads its own part only (`CutPart.lines`).

- *Same lines as without the cut.* A part holds exactly the rows
  `pipelines.engines.class_rows.class_rows` keeps of the whole history, in
  the same order, with every cell, `source_file` and `source_row`: a line of
  a product in no class is in every class (in the shard its key hashes to),
  where cleaned_history's checks report it.
- *Once per cycle.* The cut is made under the cycle's lock
  (`locks/cut/cycle=<c>.lock`): partitions that start together wait for the
  first, then read. A process killed while cutting leaves a temporary folder
  that no reader opens (the parts are written into it and the folder renamed
  into place whole, summary included) and the next cutter deletes.
- *Remade when what decides it changes.* The folder's name is a hash of the
  input folder's files (name, size, modification time), the history query,
  the `inputs` and `calendar` sections, the cycle, and every class with its
  shard count and hash columns (the class map and the successor chains come
  from the product master, a file of the folder). A cut of another
  fingerprint is deleted once the new one is in place.

The small master data (customer spans, adjustments, pins, shortages) are
read by each partition as before: a few thousand rows, cheaper to read than
to cut.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
from dataclasses import dataclass
from pathlib import Path

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from pipelines.engines.class_rows import class_map, class_rows, history_figures
from pipelines.engines.cleansing import reject_lines
from pipelines.engines.history_files import load_raw_history
from pipelines.errors import PlanningError
from pipelines.partitions import narrow_config
from pipelines.shards import class_shards, hash_columns, shard_numbers, successor_ends
from pipelines.stages.master_data import load_customer_spans, load_products
from pipelines.store import locks
from pipelines.store.files import TMP_PREFIX, fsync_dir, read_json, stale_tmp, tmp_name, write_json
from pipelines.store.layout import DEFAULT_SHARD, dir_part

CUT_FORMAT = 1  # raise when a part's content changes, so older cuts are remade
SUMMARY = "summary.json"


def cycle_folder(store: Path | str, cycle: str) -> Path:
    return Path(store) / "cut" / dir_part("cycle", cycle)


def part_path(folder: Path, product_class: str, shard: str) -> Path:
    return folder / dir_part("class", product_class) / f"{dir_part('shard', shard)}.parquet"


def fingerprint(config, cycle: str) -> str:
    """A hash of what decides the cut of `cycle` under the (whole) planning config `config` (module docstring)."""
    decided = decided_by(config, cycle)
    return hashlib.blake2b(json.dumps(decided, sort_keys=True, default=str).encode(), digest_size=12).hexdigest()


def decided_by(config, cycle: str) -> dict:
    """What decides the cut (recorded in its summary): the input folder's files (name, size, modification time in
    ns), the `inputs` and `calendar` sections, the cycle, each class's shard count and hash columns."""
    inputs = config.inputs
    folder = Path(inputs.folder)
    files = sorted(
        (p.name, s.st_size, s.st_mtime_ns) for p in folder.iterdir() if p.is_file() and (s := p.stat())
    ) if folder.is_dir() else []
    decided = {
        "format": CUT_FORMAT,
        "cycle": cycle,
        "files": files,
        "inputs": inputs.model_dump(mode="json"),  # the history query, encoding, plausible bounds
        "calendar": config.calendar.model_dump(mode="json"),
        "classes": {k: [class_shards(config, k), list(hash_columns(pc))] for k, pc in config.product_classes.items()},
    }
    return json.loads(json.dumps(decided, default=str))


def ensure_cut(store: Path | str, config, cycle: str, say=None) -> tuple[Path, bool]:
    """The folder of the cycle's cut under `config` (the whole config), made here when missing; and whether this
    call made it. Waits while another process cuts the same cycle (`say` is told)."""
    root = cycle_folder(store, cycle)
    final = root / fingerprint(config, cycle)
    if (final / SUMMARY).exists():
        return final, False
    lock = locks.acquire(
        Path(store) / "locks" / "cut" / f"{dir_part('cycle', cycle)}.lock",
        {"command": "cut the inputs", "cycle": cycle},
        what=f"the inputs' cut of cycle {cycle}",
        on_wait=say,
        on_stale=say,
    )
    try:
        if (final / SUMMARY).exists():
            return final, False
        _drop_others(root, keep=None)
        tmp = root / tmp_name(final.name)
        try:
            write_cut(tmp, config, cycle, final.name)
            os.replace(tmp, final)
        except BaseException:
            shutil.rmtree(tmp, ignore_errors=True)
            raise
        fsync_dir(root)
        _drop_others(root, keep=final.name)
        return final, True
    finally:
        locks.release(lock)


def _drop_others(root: Path, keep: str | None) -> None:
    """Temporary folders of dead cutters; with `keep`, every cut but that one (inputs changed since)."""
    if not root.is_dir():
        return
    for path in root.iterdir():
        if path.name.startswith(TMP_PREFIX):
            if stale_tmp(path):
                shutil.rmtree(path, ignore_errors=True)
        elif keep is not None and path.name != keep:
            shutil.rmtree(path, ignore_errors=True)


def write_part(path: Path, lines: pd.DataFrame) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    pq.write_table(pa.Table.from_pandas(lines, preserve_index=False), path)
    with open(path, "rb+") as f:
        os.fsync(f.fileno())


def write_cut(folder: Path, config, cycle: str, name: str) -> dict:
    """Read the history once and write every class's (shard's) part and the summary into `folder`."""
    inputs = config.inputs
    lines, files = load_raw_history(inputs.folder, inputs)
    products = load_products(inputs.folder, inputs)[0]
    # the map as the product_class_map asset holds it (raw_history's `classes` without the cut)
    classes = class_map(products[products["product"].notna()].drop_duplicates("product"))
    of_class = lines["product"].map(classes)
    no_class = of_class.isna().to_numpy()
    ends = successor_ends(products)
    summary = {
        "fingerprint": name,
        "cycle": cycle,
        "decided_by": decided_by(config, cycle),
        "history": history_figures(inputs, files, len(lines), int(no_class.sum())),
        "classes": {},
    }
    spans = None
    for k, pc in config.product_classes.items():
        rows = lines.loc[(of_class == k).to_numpy() | no_class].reset_index(drop=True)
        n = class_shards(config, k)
        counts = {}
        if n == 1:
            write_part(part_path(folder, k, DEFAULT_SHARD), rows)
            counts[DEFAULT_SHARD] = len(rows)
        else:
            numbers = shard_numbers(rows, hash_columns(pc), n, ends)
            for i in range(1, n + 1):
                write_part(part_path(folder, k, f"{i}of{n}"), rows.loc[numbers == i].reset_index(drop=True))
                counts[f"{i}of{n}"] = int((numbers == i).sum())
        first = None
        if n > 1 and spans is None:
            try:
                spans = load_customer_spans(inputs.folder, inputs)[0]
            except PlanningError:  # told by the customer_spans asset, as without the cut; no first period here
                spans = False
        if n > 1 and spans is not False:  # a shard takes the class's first trusted period (assets/cleaned_history)
            first = class_first_period(rows, products, classes, spans, narrow_config(config, cycle, k), k)
        summary["classes"][k] = {"lines": len(rows), "shards": counts, "first_period": first,
                                 "first_period_known": n > 1 and spans is not False}
    write_json(folder / SUMMARY, summary)
    return summary


def class_first_period(raw, products, classes, spans, narrowed, product_class: str) -> int | None:
    """The first period (ordinal) of the class's trusted history: its lines rejected as the class's run would."""
    mine = products[products["product_class"] == product_class]
    own_spans = class_rows(spans, classes, product_class)
    used = reject_lines(raw, mine, own_spans, narrowed.calendar, narrowed.source, narrowed.inputs.plausible)[0]
    return int(used.ordinal.min()) if len(used.ordinal) else None


@dataclass(frozen=True)
class CutPart:
    """One partition's part of the cycle's cut: its history lines and the class's summary, cut on first use."""

    store: Path
    config: object  # the whole PlanningConfig (every class: the cut is made for all of them at once)
    cycle: str
    product_class: str
    shard: str = DEFAULT_SHARD

    def folder(self, say=None) -> Path:
        return ensure_cut(self.store, self.config, self.cycle, say)[0]

    def lines(self, say=None) -> tuple[pd.DataFrame, dict]:
        """The partition's history lines (as `class_rows` keeps them of the whole history) and the history's
        figures (`history_figures`)."""
        for attempt in (1, 2):  # a cut deleted between finding it and reading it (an input changed): cut anew
            folder = self.folder(say)
            try:
                lines = pq.read_table(part_path(folder, self.product_class, self.shard)).to_pandas()
                return lines, read_json(folder / SUMMARY)["history"]
            except FileNotFoundError:
                if attempt == 2:
                    raise

    def summary(self, say=None) -> dict:
        """The class's entry of the summary: lines, lines per shard, first trusted period (a class of shards)."""
        record = read_json(self.folder(say) / SUMMARY) or read_json(self.folder(say) / SUMMARY)
        return record["classes"][self.product_class]
