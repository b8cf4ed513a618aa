"""Reading a store: the versions a read uses (latest, complete, published), the rows, the partitions written.

`StoreReader` is the read side of `pipelines.store.store.Store`; see that
module for the layout and the publication protocol.
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from pipelines.store import arrow
from pipelines.store.files import read_json
from pipelines.store.layout import LATEST, SCHEMA, VERSIONS, WRITTEN, StoreError, StoreLayout, dir_part, dir_value


class StoreReader(StoreLayout):
    """The reads of a store folder: schemas, pointers, catalog records and rows."""

    def schema(self, asset: str) -> pa.Schema | None:
        path = self.table_dir(asset) / SCHEMA
        try:
            st = path.stat()
        except FileNotFoundError:
            return None
        stamp = (st.st_mtime_ns, st.st_size)
        cached = self._schemas.get(asset)
        if cached and cached[0] == stamp:
            return cached[1]
        schema = pa.ipc.read_schema(pa.py_buffer(path.read_bytes()))
        self._schemas[asset] = (stamp, schema)
        return schema

    def latest(self, asset: str, cycle: str, product_class: str) -> dict[str, dict]:
        """shard -> latest pointer of one partition (empty when never written)."""
        class_dir = self.table_dir(asset) / dir_part("cycle", cycle) / dir_part("class", product_class)
        if not class_dir.is_dir():
            return {}
        found = {}
        for shard_dir in sorted(class_dir.iterdir()):
            pointer = read_json(shard_dir / LATEST)
            if pointer:
                found[dir_value(shard_dir.name)] = pointer
        return found

    def known_cycles(self) -> list[str]:
        """Every cycle the catalog has heard of (published, complete in part, or pending), oldest first."""
        return self._cycles_on_disk()

    def _cycles_on_disk(self) -> list[str]:
        folder = self.root / "catalog"
        return sorted(dir_value(p.name) for p in folder.glob("cycle=*")) if folder.is_dir() else []

    def published(self, cycle: str) -> dict | None:
        return read_json(self.published_path(cycle))

    def published_cycles(self) -> list[str]:
        return [c for c in self._cycles_on_disk() if self.published_path(c).exists()]

    def class_record(self, cycle: str, product_class: str) -> dict | None:
        return read_json(self.class_record_path(cycle, product_class))

    def _class_tables(self, cycle: str, versions: str) -> dict[str, dict]:
        """class -> {asset: {shard: pointer}} of one cycle for `published` or `complete` reads."""
        pub = self.published(cycle) or {}
        out = {k: v.get("tables", {}) for k, v in (pub.get("classes") or {}).items()}
        if versions == "complete":
            folder = self.cycle_dir(cycle)
            for path in folder.glob("class=*.json") if folder.is_dir() else []:
                record = read_json(path) or {}
                if record.get("state") == "complete":
                    out[dir_value(path.name[: -len(".json")])] = record.get("tables", {})
        return out

    def entries(
        self, asset: str, *, cycle: str | None = None, product_class: str | None = None, versions: str = "published"
    ) -> list[dict]:
        """The pointers (one per partition and shard) a read of `asset` uses, by cycle, class and shard."""
        if versions not in VERSIONS:
            raise ValueError(f"versions must be one of {VERSIONS}, not {versions!r}")
        if not self.check_layout():
            return []
        found = []
        if versions == "latest":
            base = self.table_dir(asset)
            cycles = [cycle] if cycle is not None else sorted(dir_value(p.name) for p in base.glob("cycle=*"))
            for c in cycles:
                classes = (
                    [product_class]
                    if product_class is not None
                    else sorted(dir_value(p.name) for p in (base / dir_part("cycle", c)).glob("class=*"))
                )
                for k in classes:
                    found += [
                        {**p, "cycle": c, "product_class": k, "shard": s} for s, p in self.latest(asset, c, k).items()
                    ]
            return found
        cycles = [cycle] if cycle is not None else self._cycles_on_disk()
        for c in cycles:
            for k, tables in sorted(self._class_tables(c, versions).items()):
                if product_class is not None and k != product_class:
                    continue
                for s, p in sorted((tables.get(asset) or {}).items()):
                    found.append({**p, "asset": asset, "cycle": c, "product_class": k, "shard": s})
        return found

    def has_table(self, asset: str) -> bool:
        return self.table_dir(asset).is_dir()

    def read(
        self,
        asset: str,
        *,
        cycle: str | None = None,
        product_class: str | None = None,
        versions: str = "published",
        with_partition: bool = False,
        where: dict[str, str] | None = None,
        as_arrow: bool = False,
        shard: str | None = None,
        columns: list[str] | None = None,
        dictionary: list[str] | None = None,
    ) -> pd.DataFrame | pa.Table | None:
        """The rows of `asset` (None when the store has no such table); see read_table. `dictionary` (with
        `as_arrow` and `columns`): these text columns kept dictionary-encoded as the files store them (int32 codes
        and each file's distinct texts), not made one string per row: for a large table of which few rows' texts
        are wanted (`pa.ChunkedArray.cast(pa.string())` on those rows); no `where` on them."""
        if dictionary and (not as_arrow or columns is None or set(dictionary) & set(where or {})):
            raise ValueError("dictionary columns are read as_arrow, with columns, and without a where on them")
        if asset == WRITTEN:
            frame = self.partitions_written(versions)
            if cycle is not None:
                frame = frame[frame[arrow.PARTITION_CYCLE] == cycle]
            if product_class is not None:
                frame = frame[frame[arrow.PARTITION_CLASS] == product_class]
            return pa.Table.from_pandas(frame, preserve_index=False) if as_arrow else frame.reset_index(drop=True)
        if not self.check_layout() or not self.has_table(asset):
            return None
        schema = self.schema(asset)
        if columns is not None:  # only these (and the filters' columns), read from each file as they are
            wanted = list(dict.fromkeys([*columns, *(where or {})]))
            schema = None if schema is None else pa.schema([_coded(f, dictionary) for f in schema if f.name in wanted])
        parts = []
        for entry in self.entries(asset, cycle=cycle, product_class=product_class, versions=versions):
            if shard is not None and entry["shard"] != shard:
                continue
            path = self.partition_dir(asset, entry["cycle"], entry["product_class"], entry["shard"]) / entry["file"]
            try:
                read = _present(path, wanted) if columns is not None else None
                table = arrow.conform(pq.read_table(path, columns=read, read_dictionary=dictionary), schema)
            except arrow.SchemaConflict as err:
                raise StoreError(
                    f"table {asset!r}, partition {entry['cycle']}|{entry['product_class']} in the store "
                    f"{self.root} was "
                    f"written by an older release: {err}; rerun the cycle {entry['cycle']} (python -m pipelines cycle "
                    f"--cycle {entry['cycle']}) to rewrite it"
                ) from None
            parts.append(arrow.where(table, where))
        if parts:
            table = arrow.concat(parts)
        elif schema is not None:
            table = schema.empty_table()
        else:
            return None
        if not with_partition:
            table = table.drop_columns([c for c in arrow.PARTITION_COLUMNS if c in table.column_names])
        if columns is not None:
            table = table.select([c for c in columns if c in table.column_names])
        return table if as_arrow else arrow.to_frame(table)

    def partitions_written(self, versions: str = "published") -> pd.DataFrame:
        """One row per asset partition and shard: rows, write time, run and file, for `versions`."""
        rows = []
        tables = self.root / "tables"
        for asset_dir in sorted(tables.glob("*")) if tables.is_dir() else []:
            for e in self.entries(asset_dir.name, versions=versions):
                rows.append(
                    {
                        "asset": asset_dir.name,
                        arrow.PARTITION_CYCLE: e["cycle"],
                        arrow.PARTITION_CLASS: e["product_class"],
                        "shard": e["shard"],
                        "rows": int(e["rows"]),
                        "written_at": pd.Timestamp(e["written_at"]).tz_localize(None),
                        "run_id": e.get("run_id", ""),
                        "file": e["file"],
                    }
                )
        columns = [
            "asset",
            arrow.PARTITION_CYCLE,
            arrow.PARTITION_CLASS,
            "shard",
            "rows",
            "written_at",
            "run_id",
            "file",
        ]
        return pd.DataFrame(rows, columns=columns)

    def cycles(self, asset: str = "cycle_calendar", versions: str = "published") -> list[str]:
        """The cycles with a partition of `asset` in `versions`, oldest first."""
        if not self.check_layout():
            return []
        return sorted({e["cycle"] for e in self.entries(asset, versions=versions)})

    def previous_cycle(self, asset: str, cycle: str, product_class: str) -> str | None:
        """The latest cycle before `cycle` in which `product_class` completed with a partition of `asset`."""
        if not self.check_layout():
            return None
        for c in reversed([c for c in self._cycles_on_disk() if c < cycle]):
            if self.entries(asset, cycle=c, product_class=product_class, versions="complete"):
                return c
        return None


def _coded(field: pa.Field, dictionary: list[str] | None) -> pa.Field:
    """`field`, of the type Parquet reads a dictionary column as when it is one of `dictionary`."""
    if dictionary and field.name in dictionary:
        return field.with_type(pa.dictionary(pa.int32(), field.type))
    return field


def _present(path: Path, wanted: list[str]) -> list[str]:
    """The columns of `wanted` that the Parquet file at `path` holds (an older file may lack a newer one)."""
    names = set(pq.read_schema(path).names)
    return [c for c in wanted if c in names]
