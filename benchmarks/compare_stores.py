"""Compare every table of two stores row by row: the proof that a change kept the cycle's numbers.

    .venv/bin/python benchmarks/compare_stores.py OLD NEW [--versions published|latest] [--no-renames]
        [--ignore TABLE.COLUMN ...]

OLD and NEW are each a store: a folder (`store.path`, Parquet files per
partition; its published cycles are read, or with `--versions latest` the
latest version of every partition: a store of `benchmarks/cycle.py --store`,
which publishes nothing) or a DuckDB file of a release before the folder store
(one table per asset). A comparison of no rows at all proves nothing: when
OLD holds no row in these versions the exit code is 2 and the message says why.

Each table of OLD is read whole (every cycle and class), its columns and
values renamed to this release's names (`RENAMES`, the old -> new table of
DEVELOPERS.md; `--no-renames` compares as stored), both sides sorted by every
column they share, and compared cell by cell: text and flags exactly, numbers
exactly (NaN equals NaN). Write times and run ids are not compared (`IGNORED`),
nor the byte size of the cycle's HTML page (it lists the checks by their new
names); the chart PNGs are compared by size. A table only in NEW is listed as
new (and its rows of `partitions_written` as additions); a table or column
only in OLD is a difference. Exit code 0 when every
table of OLD is in NEW with the same rows, 1 otherwise, 2 when OLD has no row to compare.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd

WRITTEN = "partitions_written"  # the store's own bookkeeping: one row per asset partition written
# what differs on every run
IGNORED = {(WRITTEN, "written_at"), (WRITTEN, "run_id"), (WRITTEN, "file")}
# bookkeeping of one store layout only: the DuckDB file's row order, the folder store's shard number
LAYOUT_COLUMNS = {"partition_row", "shard"}
# old -> new names of this release (issue 11): column renames per table, then value renames per (new) column
RENAMES: dict[str, dict[str, dict]] = {
    "statistical_forecast": {
        "columns": {"split_basis": "basis"},
        "values": {
            "basis": {
                "target": "reinitialized_target",
                "share": "period_share",
                "own_forecast": "leaf_forecast",
                "forecast_proportions": "children_forecast",
            }
        },
    },
    "reinitialized_target": {"columns": {"zero_share_reason": "zero_reason", "share_basis": "basis"}},
    "parent_forecast": {
        "columns": {"forecast_grain": "model_grain"},
        "values": {"model_grain": {"product_site": "parent", "product_site_customer": "leaf"}},
    },
    "plan_measures": {"values": {"basis": {"forecast_leaf": "leaf_forecast"}}},
    "share_tables": {"values": {"method": {"forecast_proportions": "children_forecast"}}},
}


def read_tables(path: Path, versions: str = "published") -> dict[str, pd.DataFrame]:
    """Every table of the store at `path` (folder: its `versions`, published cycles or the latest version of
    every partition; DuckDB file: as stored), without the columns of one layout only."""
    tables = _read_folder(path, versions) if path.is_dir() else _read_duckdb(path)
    return {name: f.drop(columns=[c for c in LAYOUT_COLUMNS if c in f.columns]) for name, f in tables.items()}


def _read_folder(path: Path, versions: str) -> dict[str, pd.DataFrame]:
    from pipelines.store import open_store

    store = open_store(path)
    names = sorted(d.name for d in (path / "tables").glob("*") if d.is_dir())
    out = {name: store.read(name, versions=versions, with_partition=True) for name in names}
    out[WRITTEN] = store.partitions_written(versions=versions)
    return {name: frame for name, frame in out.items() if frame is not None}


def _read_duckdb(path: Path) -> dict[str, pd.DataFrame]:
    with duckdb.connect(str(path), read_only=True) as con:
        names = [r[0] for r in con.execute("SELECT table_name FROM information_schema.tables ORDER BY 1").fetchall()]
        return {name: con.execute(f'SELECT * FROM "{name}"').df() for name in names}


def renamed(table: str, frame: pd.DataFrame) -> pd.DataFrame:
    """The OLD table under this release's column names and values."""
    rules = RENAMES.get(table, {})
    out = frame.rename(columns=rules.get("columns", {}))
    for column, mapping in rules.get("values", {}).items():
        if column in out.columns:
            out[column] = out[column].map(lambda v, m=mapping: m.get(v, v) if isinstance(v, str) else v)
    return out


def _comparable(frame: pd.DataFrame, columns: list[str]) -> pd.DataFrame:
    """The columns as sortable, exactly comparable values: numbers as float64, NaN/None as one missing marker."""
    out = pd.DataFrame(index=frame.index)
    for c in columns:
        s = frame[c]
        if pd.api.types.is_bool_dtype(s) or pd.api.types.is_numeric_dtype(s):
            out[c] = s.astype("float64")
        elif pd.api.types.is_datetime64_any_dtype(s):
            out[c] = s.astype(str)
        else:
            out[c] = s.astype(object).where(s.notna(), "\x00<missing>").astype(str)
    return out.sort_values(columns, kind="stable", na_position="last").reset_index(drop=True)


def compare_table(table: str, old: pd.DataFrame, new: pd.DataFrame) -> list[str]:
    """Differences of one table, as lines (empty = identical)."""
    ignored = {c for t, c in IGNORED if t == table}
    if table == "cycle_report" and "kind" in old.columns:  # the page's size follows the check names; charts must match
        old = old.assign(bytes=np.where(old["kind"] == "html", -1, old["bytes"]))
        new = new.assign(bytes=np.where(new["kind"] == "html", -1, new["bytes"]))
    only_old = sorted(set(old.columns) - set(new.columns) - ignored)
    only_new = sorted(set(new.columns) - set(old.columns))
    problems = [f"column {c} only in OLD" for c in only_old]
    notes = [f"column {c} only in NEW (not compared)" for c in only_new]
    columns = [c for c in old.columns if c in new.columns and c not in ignored]
    if len(old) != len(new):
        return problems + notes + [f"{len(old)} rows in OLD, {len(new)} in NEW"]
    a, b = _comparable(old, columns), _comparable(new, columns)
    for c in columns:
        x, y = a[c].to_numpy(), b[c].to_numpy()
        if x.dtype.kind == "f" and y.dtype.kind == "f":
            same = (x == y) | (np.isnan(x) & np.isnan(y))
        else:
            same = x == y
        if not same.all():
            i = int(np.flatnonzero(~same)[0])
            problems.append(
                f"column {c}: {int((~same).sum())} rows differ, first at sorted row {i}: OLD {x[i]!r}, NEW {y[i]!r}"
            )
    return problems + notes


def compare(old_path: Path, new_path: Path, use_renames: bool = True, versions: str = "published") -> int:
    old_tables, new_tables = read_tables(old_path, versions), read_tables(new_path, versions)
    if not any(len(frame) for name, frame in old_tables.items() if name != WRITTEN):
        print(f"NOTHING TO COMPARE: {old_path} holds no row in its {versions} versions"
              + (" (a benchmark store publishes no cycle: use --versions latest)" if versions == "published" else ""))
        return 2
    failed = 0
    for table in sorted(old_tables):
        if table not in new_tables:
            print(f"DIFF  {table}: only in OLD")
            failed += 1
            continue
        old = renamed(table, old_tables[table]) if use_renames else old_tables[table]
        new = new_tables[table]
        if table == WRITTEN and "asset" in new.columns:  # the bookkeeping of tables new in NEW is an addition
            added = new[~new["asset"].isin(old["asset"])]
            new = new[new["asset"].isin(old["asset"])]
        lines = compare_table(table, old, new)
        if table == WRITTEN and len(added):
            lines.append(
                f"{len(added)} rows of tables only in NEW ({', '.join(sorted(added['asset'].unique()))}), not compared"
            )
        bad = [line for line in lines if "not compared" not in line]
        print(f"{'DIFF' if bad else 'same'}  {table}: {len(old):,} rows")
        for line in lines:
            print(f"      {line}")
        failed += bool(bad)
    for table in sorted(set(new_tables) - set(old_tables)):
        print(f"new   {table}: {len(new_tables[table]):,} rows (not in OLD)")
    print(
        f"{len(old_tables) - failed} of {len(old_tables)} tables of OLD identical in NEW"
        + (" (after renames)" if use_renames else "")
    )
    return 1 if failed else 0


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("old", type=Path, help="store made before the change")
    p.add_argument("new", type=Path, help="store made after it")
    p.add_argument(
        "--no-renames", action="store_true", help="compare the tables as stored, without this release's renames"
    )
    p.add_argument("--ignore", action="append", default=[], metavar="TABLE.COLUMN", help="also leave this column out")
    p.add_argument("--versions", choices=("published", "latest"), default="published",
                   help="the published cycles (default) or the latest version of every partition")
    args = p.parse_args(argv)
    for item in args.ignore:
        table, _, column = item.partition(".")
        IGNORED.add((table, column))
    return compare(args.old, args.new, use_renames=not args.no_renames, versions=args.versions)


if __name__ == "__main__":
    sys.exit(main())
