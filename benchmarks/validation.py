"""The cycle's tables validated five ways, to choose how (issue 15: validation at most 15 % of own time).

    .venv/bin/python benchmarks/validation.py --leaves 10000 [--seed 7] [--stages target] [--repeat 3]
        [--only NAME,...] [--ways pandera-copy,validate_table,...] [--replicate K] [--json PATH]

Generates the scenario of `benchmarks/cycle.py` and runs the stages up to the
last one of `--stages` (from raw, clean, lifecycle, shares, basis, target,
choice, forecast, reconcile, plan; the backtest and the report left out), each
over every class at once through the run its asset calls, as the cycle
benchmark does. Then every table with rows is validated by each variant, in
turn, `--repeat` times (median of CPU seconds, `time.process_time`, so a
loaded machine moves the figures less):

    pandera-copy    model.validate(frame, lazy=True) with pandera's own backends (column, check, frame): pandera
                    copies the frame, coerces every column back into it, tests Text columns for nulls cell by
                    cell, hashes every column of a unique key (the validation before these changes)
    validate_table  pipelines.text_dtype.validate_table, what the assets call: the same model, no copy,
                    coercion off when the table holds its types, Text's not-null check in one pass, unique
                    keys proven on the ids or on runs of neighbouring rows (pipelines/unique_keys.py)
    pyarrow         the frame to a pyarrow Table, validated by pandera's pyarrow backend
    polars          the frame to a polars DataFrame, validated by pandera's polars backend (when polars is
                    importable; it is not a dependency of the project)
    duckdb          the frame registered in DuckDB, each column check as one SQL aggregate, unique keys by
                    GROUP BY ... HAVING count(*) > 1

`--replicate K` validates each table K times over (K copies, each copy's
`product` codes suffixed with its number, so keys stay unique): the tables of
K x `--leaves` leaves as far as validation is concerned (rows, columns,
distinct keys) without running the stages at that size.

pyarrow, polars and duckdb get a schema translated from the model (columns,
types, nullability, the built-in checks isin / ge / gt / le / lt, unique
keys); the models' own frame-level checks (`@dataframe_check`) are not
translated, so those variants do a little less than the model. The
conversion of the pandas frame is inside their time: the stages hand pandas
frames over, so that is what a columnar validation would cost in the cycle.
"""

from __future__ import annotations

import argparse
import json
import statistics
import sys
import time
import warnings
from pathlib import Path

import numpy as np
import pandas as pd

ROOT = Path(__file__).resolve().parents[1]
for path in (ROOT, ROOT / "benchmarks"):
    if str(path) not in sys.path:
        sys.path.insert(0, str(path))

from cycle import STEP  # noqa: E402
from cycle_inputs import make_config  # noqa: E402
from cycle_measure import load_average  # noqa: E402
from cycle_scenario import CLASSES, generate  # noqa: E402

from assets.factory import Partition, graph_order  # noqa: E402
from pipelines import definitions  # noqa: E402, F401  (makes every stage asset, so SPECS holds them all)
from pipelines.tables import MODELS  # noqa: E402
from pipelines.text_dtype import validate_table  # noqa: E402

STAGES = ("raw", "clean", "lifecycle", "shares", "basis", "target", "choice", "forecast", "reconcile", "plan")
KIND = {"str": "text", "float64": "float", "int64": "int", "bool": "bool", "datetime64[ns]": "date"}
RANGE_SQL = {"greater_than_or_equal_to": "<", "greater_than": "<=", "less_than_or_equal_to": ">", "less_than": ">="}


def cycle_tables(args: argparse.Namespace) -> dict[str, pd.DataFrame]:
    """Every table of the cycle up to `--stages`, made by the stages' own runs (every class at once)."""
    last = STAGES.index(args.stages)
    config = make_config(args.periods, args.horizon, False, None)
    scen = generate(args.leaves, args.seed, args.periods, None, args.horizon)
    tables = {"products": scen.products, "customer_spans": scen.spans, "raw_history": scen.raw,
              "adjustments": scen.adjustments, "pins": scen.pins, "shortages": scen.shortages}
    tables = {name: validate_table(MODELS[name], frame) for name, frame in tables.items()}
    for name in ("backtest_accuracy", "backtest_losses", "share_tuning"):
        tables[name] = pd.DataFrame({c: pd.Series(dtype=object) for c in MODELS[name].to_schema().columns})
    part = Partition(config, config, "2026-11-30", CLASSES[0])
    for spec in graph_order():
        step = STEP.get(spec.tables[0].name)
        if step not in STAGES[1: last + 1]:
            continue
        started = time.perf_counter()
        result = spec.run(**{name: tables[name] for name in spec.ins}, settings=spec.settings(part))
        for table in spec.tables:
            tables[table.name] = validate_table(MODELS[table.name], result.outputs[table.name])
        print(f"  {step}: {spec.tables[0].name} made in {time.perf_counter() - started:.1f} s", flush=True)
    return {name: frame for name, frame in tables.items() if len(frame)}


def replicate(frame: pd.DataFrame, k: int) -> pd.DataFrame:
    """`k` copies of `frame`, copy i's product codes (and successor, source product, source file: every unique key
    holds one of them) suffixed with `~i`."""
    copies = []
    for i in range(k):
        copy = frame.copy()
        for column in ("product", "successor", "source_product", "source_file"):
            if column in copy.columns and copy[column].dtype == object:  # one new str per distinct code, as made
                codes, distinct = pd.factorize(copy[column])
                renamed = np.array([f"{v}~{i}" for v in distinct] + [None], dtype=object)
                copy[column] = renamed[codes]
        copies.append(copy)
    return pd.concat(copies, ignore_index=True)


# =================================================================== the variants
def pandera_copy(model, frame):
    """pandera's own backends (column, check and frame: its unique key by `DataFrame.duplicated`) for one call."""
    from pandera.api.checks import Check
    from pandera.api.pandas.components import Column
    from pandera.api.pandas.container import DataFrameSchema
    from pandera.backends.pandas.checks import PandasCheckBackend
    from pandera.backends.pandas.components import ColumnBackend
    from pandera.backends.pandas.container import DataFrameSchemaBackend

    ours = {}
    pandera_own = ((Column, ColumnBackend), (Check, PandasCheckBackend), (DataFrameSchema, DataFrameSchemaBackend))
    for api, backend in pandera_own:
        ours[api] = api.BACKEND_REGISTRY[(api, pd.DataFrame)]
        api.BACKEND_REGISTRY[(api, pd.DataFrame)] = backend
    try:
        return model.validate(frame, lazy=True)
    finally:
        for api, backend in ours.items():
            api.BACKEND_REGISTRY[(api, pd.DataFrame)] = backend


def _translated(module, types: dict, model):
    schema = model.to_schema()
    columns = {name: module.Column(types[KIND.get(str(col.dtype), "text")], nullable=col.nullable,
                                   required=col.required, checks=list(col.checks))
               for name, col in schema.columns.items()}
    return module.DataFrameSchema(columns, unique=schema.unique, strict=True)


def via_pyarrow(model, frame):
    import pandera.pyarrow as ppa
    import pyarrow as pa

    types = {"text": pa.string(), "float": pa.float64(), "int": pa.int64(), "bool": pa.bool_(),
             "date": pa.timestamp("ns")}
    return _translated(ppa, types, model).validate(pa.Table.from_pandas(frame, preserve_index=False), lazy=True)


def via_polars(model, frame):
    import pandera.polars as ppl
    import polars as pl

    types = {"text": pl.Utf8, "float": pl.Float64, "int": pl.Int64, "bool": pl.Boolean, "date": pl.Datetime("ns")}
    return _translated(ppl, types, model).validate(pl.from_pandas(frame), lazy=True)


def via_duckdb(model, frame):
    import duckdb

    schema = model.to_schema()
    parts = []
    for name, col in schema.columns.items():
        if name not in frame.columns:
            continue
        quoted = f'"{name}"'
        if not col.nullable:
            parts.append(f"count(*) FILTER (WHERE {quoted} IS NULL)")
        for check in col.checks:
            stats = check.statistics
            if check.name == "isin":
                values = ", ".join("'" + str(v).replace("'", "''") + "'" for v in stats["allowed_values"])
                parts.append(f"count(*) FILTER (WHERE {quoted} NOT IN ({values}))")
            elif check.name in RANGE_SQL:
                parts.append(f"count(*) FILTER (WHERE {quoted} {RANGE_SQL[check.name]} {list(stats.values())[0]})")
    con = duckdb.connect()
    con.register("t", frame)
    counts = con.execute("SELECT " + (", ".join(parts) or "count(*)") + " FROM t").fetchone()
    if schema.unique:
        keys = ", ".join(f'"{k}"' for k in schema.unique)
        con.execute(f"SELECT count(*) FROM (SELECT {keys} FROM t GROUP BY {keys} HAVING count(*) > 1)").fetchone()
    con.close()
    return counts


def variants(only: str = "") -> dict:
    out = {"pandera-copy": pandera_copy, "validate_table": validate_table, "pyarrow": via_pyarrow}
    try:
        import polars  # noqa: F401

        out["polars"] = via_polars
    except ImportError:
        print("polars is not importable: its variant is left out")
    out["duckdb"] = via_duckdb
    return {way: fn for way, fn in out.items() if not only or way in only.split(",")}


def timed(fn, model, frame) -> float | None:
    """CPU seconds of one validation (failing the schema counts as done); None when the variant cannot run."""
    started = time.process_time()
    try:
        fn(model, frame)
    except Exception as err:
        if type(err).__name__ not in ("SchemaErrors", "SchemaError"):
            print(f"  {model.__name__}: {fn.__name__} cannot: {type(err).__name__}: {str(err)[:160]}")
            return None
    return time.process_time() - started


def measure(tables: dict[str, pd.DataFrame], repeat: int, k: int = 1, only: str = "") -> list[dict]:
    ways = variants(only)
    rows = []
    for name in list(tables):
        frame = replicate(tables.pop(name), k) if k > 1 else tables.pop(name)  # one table at a time in memory
        model = MODELS[name]
        seconds: dict[str, list | None] = {way: [] for way in ways}
        for _ in range(repeat):
            for way, fn in ways.items():
                if seconds[way] is not None:
                    took = timed(fn, model, frame)
                    seconds[way] = None if took is None else seconds[way] + [took]
        row = {"table": name, "rows": len(frame)}
        row.update({way: statistics.median(s) if s else None for way, s in seconds.items()})
        rows.append(row)
        print(f"{name:<24} {len(frame):>11,} " + " ".join(
            f"{'-' if row[w] is None else f'{row[w]:.3f}':>14}" for w in ways), flush=True)
    return rows


def main(argv: list[str] | None = None) -> None:
    p = argparse.ArgumentParser(prog="benchmarks/validation.py", description=__doc__.splitlines()[0])
    p.add_argument("--leaves", type=int, required=True)
    p.add_argument("--seed", type=int, default=7)
    p.add_argument("--periods", type=int, default=156)
    p.add_argument("--horizon", type=int, default=26)
    p.add_argument("--stages", choices=STAGES, default="target", help="run the stages up to this one (default target)")
    p.add_argument("--only", default="", help="comma list of tables to validate (default every table with rows)")
    p.add_argument("--repeat", type=int, default=3)
    p.add_argument("--ways", default="", help="comma list of the variants to time (default all)")
    p.add_argument("--replicate", type=int, default=1, help="validate K copies of each table (keys kept unique)")
    p.add_argument("--json", default=None, metavar="PATH")
    args = p.parse_args(argv)
    warnings.filterwarnings("ignore")
    load_start = load_average()
    print(f"validation variants: {args.leaves:,} leaves, seed {args.seed}, stages up to {args.stages}")
    tables = cycle_tables(args)
    if args.only:
        tables = {n: tables[n] for n in args.only.split(",") if n in tables}
    print(f"{'table':<24} {'rows':>11} " + " ".join(f"{w:>14}" for w in variants(args.ways)) + "   (CPU s, median)")
    rows = measure(tables, args.repeat, args.replicate, args.ways)
    sums = {w: sum(r[w] for r in rows if r.get(w) is not None) for w in variants(args.ways)}
    print(f"{'sum':<24} {sum(r['rows'] for r in rows):>11,} " + " ".join(f"{v:>14.3f}" for v in sums.values()))
    load = {"start": load_start, "end": load_average()}
    print(f"load average (1 min) at start and end: {load['start']['load_1m']:.2f}, {load['end']['load_1m']:.2f}")
    if args.json:
        Path(args.json).parent.mkdir(parents=True, exist_ok=True)
        Path(args.json).write_text(json.dumps({"parameters": vars(args), "tables": rows, "sums": sums,
                                               "load": load}, indent=2, default=str))
        print(f"wrote {args.json}")


if __name__ == "__main__":
    main()
