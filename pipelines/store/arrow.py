"""Frames to Arrow tables and back, and the union schema of a table's partitions.

No per-row Python: pandas frames go through `pa.Table.from_pandas`, constant
partition columns are filled by Arrow kernels, reads are `pq.read_table`.
"""

from __future__ import annotations

import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

PARTITION_CYCLE = "partition_cycle"
PARTITION_CLASS = "partition_class"
PARTITION_COLUMNS = (PARTITION_CYCLE, PARTITION_CLASS)


class SchemaConflict(ValueError):
    """A stored partition cannot be read as the table's current schema."""


def to_arrow(data: pd.DataFrame | pa.Table, cycle: str, product_class: str) -> pa.Table:
    """The table as stored: the partition columns first, then the data's columns in their order.

    Text columns of a frame (object dtype) are written as strings even when
    every value is missing, so a table's types do not depend on its content.
    Pandas' own schema metadata is dropped: what is read back is plain Arrow.
    """
    if isinstance(data, pd.DataFrame):
        names = [str(c) for c in data.columns]
        if len(set(names)) != len(names):
            raise ValueError(f"the frame has repeated column names: {names}")
        table = pa.table([_column(data.iloc[:, i]) for i in range(data.shape[1])], names=names)
    elif isinstance(data, pa.Table):
        table = data
    else:
        raise TypeError(f"the store writes pandas DataFrames or Arrow tables, not {type(data).__name__}")
    table = table.drop_columns([c for c in PARTITION_COLUMNS if c in table.column_names])
    table = table.replace_schema_metadata(None)
    n = table.num_rows
    table = table.add_column(0, PARTITION_CLASS, pc.fill_null(pa.nulls(n, pa.string()), product_class))
    return table.add_column(0, PARTITION_CYCLE, pc.fill_null(pa.nulls(n, pa.string()), cycle))


def _column(series: pd.Series) -> pa.Array:
    """One column as Arrow; text (object) columns as strings, converted by Arrow's own loop."""
    values = series.reset_index(drop=True)
    if values.dtype != object:
        return pa.Array.from_pandas(values)
    try:
        return pa.array(values, type=pa.string(), from_pandas=True)
    except (pa.ArrowTypeError, pa.ArrowInvalid):  # objects that are not text (dates, numbers): their text form
        return pa.array(values.astype("string"), type=pa.string(), from_pandas=True)


def _numeric(t: pa.DataType) -> bool:
    return pa.types.is_integer(t) or pa.types.is_floating(t)


def merge_schema(old: pa.Schema | None, new: pa.Schema) -> pa.Schema:
    """The union of a table's schema so far and a new partition's.

    A new column is added (older partitions read it as null); a column first
    written without a type (all null) takes the new type; whole and fractional
    numbers widen to float64 (integers of two widths to int64); any other change
    of type takes the newer type, and older partitions are cast when read.
    """
    if old is None:
        return new
    fields = {f.name: f for f in old}
    order = list(old.names)
    for f in new:
        if f.name not in fields:
            fields[f.name] = f
            order.append(f.name)
            continue
        before = fields[f.name].type
        if before == f.type or pa.types.is_null(f.type):
            continue
        if pa.types.is_null(before):
            fields[f.name] = f
        elif _numeric(before) and _numeric(f.type):
            wide = pa.int64() if pa.types.is_integer(before) and pa.types.is_integer(f.type) else pa.float64()
            fields[f.name] = pa.field(f.name, wide)
        else:
            fields[f.name] = f
    return pa.schema([fields[n] for n in order])


def conform(table: pa.Table, schema: pa.Schema | None) -> pa.Table:
    """`table` with every column of `schema`, in its order and types (missing columns null)."""
    if schema is None:
        return table
    columns, names = [], []
    for f in schema:
        if f.name in table.column_names:
            col = table[f.name]
            if col.type != f.type:
                try:
                    col = col.cast(f.type)
                except (pa.ArrowInvalid, pa.ArrowNotImplementedError) as err:
                    raise SchemaConflict(
                        f"column {f.name!r} was written as {col.type} and is now {f.type}: {err}"
                    ) from None
        else:
            col = pa.nulls(table.num_rows, f.type)
        columns.append(col)
        names.append(f.name)
    for name in table.column_names:  # a column the union schema does not know yet (written meanwhile)
        if name not in schema.names:
            columns.append(table[name])
            names.append(name)
    return pa.table(columns, names=names)


def concat(tables: list[pa.Table]) -> pa.Table:
    """Partitions one after another; missing columns null, numbers widened."""
    if len(tables) == 1:
        return tables[0]
    return pa.concat_tables(tables, promote_options="permissive")


def where(table: pa.Table, filters: dict[str, str] | None) -> pa.Table:
    """Rows whose columns equal the given values; a filter on a column the table lacks is no filter."""
    mask = None
    for name, value in (filters or {}).items():
        if name not in table.column_names:
            continue
        hit = pc.fill_null(pc.equal(table[name], pa.scalar(value).cast(table.schema.field(name).type)), False)
        mask = hit if mask is None else pc.and_(mask, hit)
    return table if mask is None else table.filter(mask)


def to_frame(table: pa.Table) -> pd.DataFrame:
    return table.to_pandas()
