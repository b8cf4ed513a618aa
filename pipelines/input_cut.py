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

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from pipelines.engines.class_rows import class_map, class_rows, history_figures
from pipelines.engines.cleansing import reject_lines
from pipelines.engines.history_files import iter_raw_history
from pipelines.engines.plausible import gap_periods, trusted_extent
from pipelines.errors import PlanningError
from pipelines.partitions import narrow_config
from pipelines.shards import class_shards, hash_columns, shard_numbers, successor_ends
from pipelines.stages.master_data import load_customer_spans, load_products
from pipelines.store import locks
from pipelines.store.files import TMP_PREFIX, fsync_dir, read_json, stale_tmp, tmp_name, write_json
from pipelines.store.layout import DEFAULT_SHARD, dir_part

CUT_FORMAT = 1  # raise when a part's content changes, so older cuts are remade
SUMMARY = "summary.json"
ROW_GROUP_ROWS = 1 << 16  # rows a part's writer buffers before it writes them (one row group)
CHUNK = 8 << 20  # bytes of history read at a time (about 200,000 lines): the cut's working memory is a few times it
# no first period: `reject_lines` then rejects no line as `isolated_date` (below every period ordinal)
NO_FIRST_PERIOD = np.iinfo(np.int64).min


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


class PartWriters:
    """One Parquet writer per part, fed chunk by chunk: each part's rows appended in the order given, buffered up
    to `ROW_GROUP_ROWS` rows (a row group) so the parts of small chunks are not read back in crumbs.

    The schema is fixed by the first chunk (what `pa.Table.from_pandas` makes of the history's frame: text
    columns as strings, `source_row` int64; a column without a value yet as a string), so every part, read
    back, is the frame its rows make, an empty part the empty frame of those columns."""

    def __init__(self, paths: list[Path]):
        self.paths = paths
        self.schema: pa.Schema | None = None
        self.buffers: dict[Path, list[pa.Table]] = {p: [] for p in paths}
        self.writers: dict[Path, pq.ParquetWriter] = {}
        self.empty: pd.DataFrame | None = None  # the columns, before a row came

    def add(self, path: Path, rows: pd.DataFrame) -> None:
        if len(rows) == 0:
            self.empty = rows.iloc[:0] if self.empty is None else self.empty
            return
        if self.schema is None:
            self._fix_schema(rows.iloc[:1])
        self.buffers[path].append(pa.Table.from_pandas(rows, schema=self.schema, preserve_index=False))
        if sum(t.num_rows for t in self.buffers[path]) >= ROW_GROUP_ROWS:
            self._flush(path)

    def _fix_schema(self, sample: pd.DataFrame) -> None:
        schema = pa.Table.from_pandas(sample, preserve_index=False).schema
        fields = [pa.field(f.name, pa.string()) if pa.types.is_null(f.type) else f for f in schema]
        self.schema = pa.schema(fields, metadata=schema.metadata)

    def _flush(self, path: Path) -> None:
        if self.schema is None:  # no line at all
            self._fix_schema(self.empty if self.empty is not None else pd.DataFrame())
        tables = self.buffers[path]
        if path not in self.writers:
            path.parent.mkdir(parents=True, exist_ok=True)
            self.writers[path] = pq.ParquetWriter(path, self.schema)
        if tables:
            self.writers[path].write_table(pa.concat_tables(tables) if len(tables) > 1 else tables[0])
        self.buffers[path] = []

    def close(self) -> None:
        """Every part written out (a part without rows as an empty file of the schema) and synced."""
        for path in self.paths:
            self._flush(path)
            finish_part(path, self.writers.pop(path))


def finish_part(path: Path, writer: pq.ParquetWriter) -> None:
    """The part's file closed and on disk."""
    writer.close()
    with open(path, "rb+") as f:
        os.fsync(f.fileno())


def write_cut(folder: Path, config, cycle: str, name: str, chunk_bytes: int = CHUNK) -> dict:
    """Read the history once, chunk by chunk (`iter_raw_history`, about `chunk_bytes` at a time), and write every
    class's (shard's) part and the summary into `folder`: a chunk's lines are routed to their parts as the whole
    history's were (`class_rows`, `shard_numbers` are per line), so a part holds the same rows in the same
    order whatever the chunk size. A sharded class's first trusted period is found afterwards from its parts
    (`first_periods`)."""
    inputs = config.inputs
    products = load_products(inputs.folder, inputs)[0]
    # the map as the product_class_map asset holds it (raw_history's `classes` without the cut)
    classes = class_map(products[products["product"].notna()].drop_duplicates("product"))
    ends = successor_ends(products)
    shards = {k: [DEFAULT_SHARD] if (n := class_shards(config, k)) == 1 else [f"{i}of{n}" for i in range(1, n + 1)]
              for k in config.product_classes}
    writers = PartWriters([part_path(folder, k, s) for k, names in shards.items() for s in names])
    counts = {k: dict.fromkeys(names, 0) for k, names in shards.items()}
    files: list = []
    lines_read = no_class_lines = 0
    for lines in iter_raw_history(inputs.folder, inputs, files, chunk_bytes):
        of_class = lines["product"].map(classes)
        no_class = of_class.isna().to_numpy()
        lines_read, no_class_lines = lines_read + len(lines), no_class_lines + int(no_class.sum())
        for k, pc in config.product_classes.items():
            rows = lines.loc[(of_class == k).to_numpy() | no_class]
            numbers = shard_numbers(rows, hash_columns(pc), len(shards[k]), ends)
            for i, shard in enumerate(shards[k], start=1):
                mine = rows if len(shards[k]) == 1 else rows.loc[numbers == i]
                writers.add(part_path(folder, k, shard), mine)
                counts[k][shard] += len(mine)
    writers.close()
    summary = {
        "fingerprint": name,
        "cycle": cycle,
        "decided_by": decided_by(config, cycle),
        "history": history_figures(inputs, files, lines_read, no_class_lines),
        "classes": {},
    }
    firsts = first_periods(folder, config, cycle, products, classes, shards)
    for k in config.product_classes:
        summary["classes"][k] = {"lines": sum(counts[k].values()), "shards": counts[k],
                                 "first_period": firsts.get(k), "first_period_known": k in firsts}
    write_json(folder / SUMMARY, summary)
    return summary


def first_periods(folder: Path, config, cycle: str, products, classes, shards: dict) -> dict[str, int | None]:
    """Each sharded class's first trusted period (what `class_first_period` gives on the class's lines), from its
    parts read back one at a time; none when the customer spans cannot be read (the customer_spans asset tells
    it, as without the cut).

    Why the parts give the whole class's answer: every rule of `reject_lines` before `isolated_date` is judged
    on the line alone or on the lines of its leaf (`duplicate_of_other_file`), and a leaf's lines all hash to
    one shard (the shard's columns are part of the leaf's key); the cycle date is the partition's (fixed by
    `narrow_config`). So the lines a shard keeps with no first period are exactly the class's before
    `isolated_date`; `trusted_extent` needs only how many there are per period, added over the shards; the
    first period is the first of those periods from the trusted start on."""
    sharded = [k for k, names in shards.items() if len(names) > 1]
    if not sharded:
        return {}
    inputs = config.inputs
    try:
        spans = load_customer_spans(inputs.folder, inputs)[0]
    except PlanningError:
        return {}
    out = {}
    for k in sharded:
        narrowed = narrow_config(config, cycle, k)
        mine = products[products["product_class"] == k]
        own_spans = class_rows(spans, classes, k)
        per_period: dict[int, int] = {}
        for shard in shards[k]:
            raw = pq.read_table(part_path(folder, k, shard)).to_pandas()
            used = reject_lines(raw, mine, own_spans, narrowed.calendar, narrowed.source, narrowed.inputs.plausible,
                                first_period=NO_FIRST_PERIOD)[0]
            periods, n = np.unique(used.ordinal, return_counts=True)
            for p, c in zip(periods.tolist(), n.tolist(), strict=True):
                per_period[p] = per_period.get(p, 0) + c
            del raw, used
        out[k] = first_trusted(per_period, narrowed)
    return out


def first_trusted(per_period: dict[int, int], narrowed) -> int | None:
    """The first period of the trusted history of lines counted per period (`trusted_extent` without trimming
    the end, as `reject_lines` finds the first period), or None without lines."""
    if not per_period:
        return None
    periods = np.array(sorted(per_period), dtype=np.int64)
    ordinals = np.repeat(periods, [per_period[p] for p in periods.tolist()])
    gap = gap_periods(narrowed.inputs.plausible.isolation_gap_years, narrowed.calendar.period)
    start = trusted_extent(ordinals, gap, trim_end=False)[0]
    return int(periods[periods >= start].min())


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
