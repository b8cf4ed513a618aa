"""`python -m pipelines export`: a published cycle's leaf forecast and plan measures as files, with a manifest.

What it writes into the folder `--to` (created when missing):

    leaf_forecast.<csv|parquet>    the leaf forecast (store table `statistical_forecast`), one row per leaf and period
    plan_measures.<csv|parquet>    every plan measure (store table `plan_measures`), one row per leaf, period, measure
    manifest.json                  cycle, classes, and per file: rows (in all and per class), columns with their
                                   types, bytes and sha256, so a loader can check what it received

Only a published cycle is exported (every class passed its blocking checks,
`pipelines/store/store.py`): the versions its publication record names, the
same rows `summary`, `explain` and the SQL views show. An incomplete cycle is
refused with a PlanningError naming each class that is missing and why
(the command then exits 2). `--class` exports some classes of it.

Rows are sorted by class and keys, so two exports of one publication give
the same bytes. Dates are ISO dates (`YYYY-MM-DD`, Parquet `date32`); in
CSV (UTF-8, comma, header line, `"` quoting where needed) a blank cell is a
null and booleans are `true` / `false`. Each file is written under a
temporary name and renamed into place, the manifest last: a loader that
finds the manifest finds files that match it. Memory: one class's partition
of one table at a time.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import os
import re
from dataclasses import dataclass, replace
from pathlib import Path

import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from pipelines.errors import PlanningError
from pipelines.store import open_store
from pipelines.vocabulary import INTERVAL_COLUMN_PATTERN

FORMATS = ("parquet", "csv")
MANIFEST = "manifest.json"
MANIFEST_FORMAT = "apportion-export"
MANIFEST_VERSION = 1
KEYS = ("product", "site", "customer", "period_start")


@dataclass(frozen=True)
class ExportTable:
    """One exported file: the store table it comes from, its columns (name -> Arrow type) and its row order."""

    name: str
    table: str
    columns: dict[str, pa.DataType]
    sort: tuple[str, ...]
    extra: str | None = None  # further float columns the stored table may hold (a regex on their names), in its order

    def with_extras(self, names: list[str]) -> ExportTable:
        """This export with the stored table's extra columns (e.g. the interval bounds of config intervals.levels)."""
        extras = [n for n in names if self.extra and re.fullmatch(self.extra, n) and n not in self.columns]
        return replace(self, columns={**self.columns, **{n: pa.float64() for n in extras}})

    @property
    def schema(self) -> pa.Schema:
        return pa.schema(list(self.columns.items()))


# README, "Export": one row per column, in this order
EXPORTS = (
    ExportTable(
        "leaf_forecast",
        "statistical_forecast",
        {
            "cycle_date": pa.date32(),
            "product_class": pa.string(),
            "product": pa.string(),
            "site": pa.string(),
            "customer": pa.string(),
            "period_start": pa.date32(),
            "forecast": pa.float64(),
            "parent_forecast": pa.float64(),
            "basis": pa.string(),
        },
        ("product_class",) + KEYS,
        INTERVAL_COLUMN_PATTERN,
    ),
    ExportTable(
        "plan_measures",
        "plan_measures",
        {
            "cycle_date": pa.date32(),
            "product_class": pa.string(),
            "product": pa.string(),
            "site": pa.string(),
            "customer": pa.string(),
            "period_start": pa.date32(),
            "measure": pa.string(),
            "value": pa.float64(),
            "parent_value": pa.float64(),
            "rule": pa.string(),
            "basis": pa.string(),
            "fallback": pa.string(),
            "pinned": pa.bool_(),
        },
        ("product_class",) + KEYS + ("measure",),
    ),
)

TYPE_NAMES = {pa.date32(): "date", pa.string(): "string", pa.float64(): "float64", pa.bool_(): "bool"}


class ExportRefused(PlanningError):
    """The cycle cannot be exported: not published (a class incomplete), or not in the store."""


def _published_classes(store, cycle: str, classes: list[str], asked: list[str] | None) -> tuple[dict, list[str]]:
    """The cycle's publication record and the classes to export; ExportRefused naming what is missing."""
    if not store.check_layout():
        raise ExportRefused(f"no store at {store.root}: no cycle has been run yet; run one first (make demo)")
    published = store.published(cycle)
    if published is None:
        status = store.status(cycle, classes)
        known = store.known_cycles()
        what = (
            f"cycle {cycle} has never been run in the store {store.root}"
            if cycle not in known
            else f"cycle {cycle} is not complete (a cycle is published only when every class passed its blocking "
            f"checks); missing: " + "; ".join(status.describe_class(k) for k in status.incomplete)
        )
        done = store.published_cycles()
        raise ExportRefused(
            f"{what}. Nothing is exported. Run it (python -m pipelines cycle --cycle {cycle}) or rebuild the "
            f"classes named, then export again; published cycles: {', '.join(done) or 'none yet'}"
        )
    have = sorted(published.get("classes") or {})
    unknown = [k for k in asked or [] if k not in have]
    if unknown:
        raise ExportRefused(
            f"--class {', '.join(unknown)}: not a class of the published cycle {cycle}; its classes are "
            f"{', '.join(have)}"
        )
    return published, sorted(set(asked)) if asked else have


def _conform(table: pa.Table, spec: ExportTable, product_class: str, where: str) -> pa.Table:
    """The stored partition as the export's columns and types, sorted."""
    if "product_class" not in table.column_names:
        table = table.append_column("product_class", pa.repeat(product_class, table.num_rows).cast(pa.string()))
    missing = [c for c in spec.columns if c not in table.column_names]
    if missing:
        raise ExportRefused(
            f"{where} has no column(s) {missing}: it was written by an older release; rerun the cycle to rewrite it"
        )
    columns = []
    for name, kind in spec.columns.items():
        col = table.column(name)
        if pa.types.is_timestamp(col.type) and kind == pa.date32():
            col = col.cast(pa.date32())
        columns.append(col.cast(kind))
    out = pa.table(columns, schema=spec.schema)
    return out.sort_by([(c, "ascending") for c in spec.sort]) if out.num_rows else out


def sha256_of(path: Path, block: int = 1 << 20) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        while chunk := fh.read(block):
            digest.update(chunk)
    return digest.hexdigest()


def _writer(path: Path, schema: pa.Schema, file_format: str):
    if file_format == "parquet":
        return pq.ParquetWriter(path, schema)
    return pacsv.CSVWriter(path, schema, write_options=pacsv.WriteOptions(include_header=True))


def _export_table(store, cycle: str, classes: list[str], spec: ExportTable, folder: Path, file_format: str) -> dict:
    final = folder / f"{spec.name}.{file_format}"
    tmp = folder / f".{final.name}.tmp-{os.getpid()}"
    per_class = {}
    try:
        writer = None
        try:
            for k in classes:
                stored = store.read(spec.table, cycle=cycle, product_class=k, versions="published", as_arrow=True)
                if stored is None:
                    raise ExportRefused(f"the store {store.root} has no table {spec.table}; rerun cycle {cycle}")
                if writer is None:  # the columns are those of the first class's table (one config, one set)
                    spec = spec.with_extras(stored.column_names)
                    writer = _writer(tmp, spec.schema, file_format)
                part = _conform(stored, spec, k, f"table {spec.table}, partition {cycle}|{k}")
                if part.num_rows:
                    writer.write_table(part)
                per_class[k] = part.num_rows
            writer = writer or _writer(tmp, spec.schema, file_format)
            if file_format == "parquet" and not sum(per_class.values()):
                writer.write_table(spec.schema.empty_table())
        finally:
            if writer is not None:
                writer.close()
        with open(tmp, "rb+") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, final)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return {
        "name": final.name,
        "table": spec.name,
        "store_table": spec.table,
        "rows": sum(per_class.values()),
        "rows_per_class": per_class,
        "columns": [{"name": n, "type": TYPE_NAMES[t]} for n, t in spec.columns.items()],
        "bytes": final.stat().st_size,
        "sha256": sha256_of(final),
    }


def export_cycle(
    store_path: Path | str,
    cycle: str,
    to: Path | str,
    file_format: str = "parquet",
    classes: list[str] | None = None,
    all_classes: list[str] | None = None,
) -> dict:
    """Write the published `cycle`'s leaf forecast and plan measures into `to`; the manifest written.

    `classes`: only these classes of the cycle (default every class it
    published); `all_classes`: the config's classes, named when the cycle is
    incomplete. Raises ExportRefused for a cycle that is not published.
    """
    if file_format not in FORMATS:
        raise ExportRefused(f"--format {file_format!r}: give one of {', '.join(FORMATS)}")
    store = open_store(store_path)
    published, chosen = _published_classes(store, str(cycle), list(all_classes or []), classes)
    folder = Path(to)
    if folder.exists() and not folder.is_dir():
        raise ExportRefused(f"--to {folder} is a file; give a folder (it is created when missing)")
    folder.mkdir(parents=True, exist_ok=True)
    (folder / MANIFEST).unlink(missing_ok=True)  # an earlier export's manifest never describes these files
    files = [_export_table(store, str(cycle), chosen, spec, folder, file_format) for spec in EXPORTS]
    manifest = {
        "format": MANIFEST_FORMAT,
        "version": MANIFEST_VERSION,
        "cycle": str(cycle),
        "classes": chosen,
        "published_at": published.get("published_at"),
        "publication_sequence": published.get("sequence"),
        "runs": {k: published["classes"][k].get("run_id") for k in chosen},
        "exported_at": dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds"),
        "file_format": file_format,
        "csv": {"encoding": "utf-8", "delimiter": ",", "header": True, "null": "", "booleans": ["true", "false"]}
        if file_format == "csv"
        else None,
        "files": files,
    }
    tmp = folder / f".{MANIFEST}.tmp-{os.getpid()}"
    tmp.write_text(json.dumps(manifest, indent=2) + "\n")
    os.replace(tmp, folder / MANIFEST)
    return manifest


def newer_run_note(store, cycle: str, classes: list[str]) -> str | None:
    """A line to print when a later run of the exported cycle has not completed (the export holds the published)."""
    status = store.status(str(cycle), classes)
    if not status.newer_run_incomplete:
        return None
    return (
        f"note: a later run of cycle {cycle} has not completed ("
        + "; ".join(status.describe_class(k) for k in status.incomplete)
        + f"); the export holds the versions published {status.published['published_at'][:19]} UTC"
    )


def add_parser(sub, config_arg) -> None:
    """The `export` subcommand of `python -m pipelines`."""
    p = sub.add_parser(
        "export",
        help="write a published cycle's leaf forecast and plan measures as Parquet or CSV files, with a manifest",
    )
    config_arg(p)
    p.add_argument("--cycle", required=True, help="the cycle date YYYY-MM-DD (it must be published)")
    p.add_argument(
        "--class", dest="classes", action="append", default=None, help="only this product class (repeatable)"
    )
    p.add_argument("--format", dest="file_format", choices=FORMATS, default="parquet")
    p.add_argument("--to", required=True, help="folder to write into (created when missing)")


def command(args) -> int:
    """Run `python -m pipelines export`: 0 when written; a refused cycle raises ExportRefused (exit 2)."""
    from pipelines.resources import PlanningConfigResource

    config = PlanningConfigResource(path=args.config).config
    manifest = export_cycle(
        config.store.path,
        args.cycle,
        args.to,
        file_format=args.file_format,
        classes=args.classes,
        all_classes=list(config.product_classes),
    )
    folder = Path(args.to)
    for f in manifest["files"]:
        print(f"{folder / f['name']}: {f['rows']:,} rows, sha256 {f['sha256']}")
    print(f"{folder / MANIFEST}: cycle {manifest['cycle']}, classes {', '.join(manifest['classes'])}")
    note = newer_run_note(open_store(config.store.path), args.cycle, list(config.product_classes))
    if note:
        print(note)
    return 0
