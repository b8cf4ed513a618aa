"""`python -m pipelines export`: a published cycle's leaf forecast and plan measures as files a loader can check.

The cycle is two demo classes made by the stages' own runs (`stage_runs`),
written into a store and published as the publication asset does it
(`Store.complete_class`). The manifest is checked against the files by
hashlib's sha256 and by reading them back with pyarrow; the CSV and the
Parquet files must hold the same rows.
"""

from __future__ import annotations

import hashlib
import json
import re
from pathlib import Path

import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pytest
import yaml
from stage_runs import ROOT, demo_config, run_partition

from pipelines import __main__ as cli
from pipelines.export import EXPORTS, MANIFEST, TYPE_NAMES, ExportRefused, export_cycle
from pipelines.keys import LEAF_ID, PARENT_ID
from pipelines.store import open_store, write_partition
from pipelines.tables import MODELS

CYCLE = "2026-11-30"
CLASSES = ["consumables", "seasonal"]


@pytest.fixture(scope="module")
def tables() -> dict[str, dict[str, object]]:
    """class -> {table: frame} of the two classes, by the stages' own runs."""
    # fixed window, method and seasonality: the stages run here without the backtest that decides an `auto` one
    config = demo_config({
        "seasonal": {"strategy": "top_down", "window": 52, "method": "pooled"}, "consumables": {"seasonality": "none"}
    })
    out = {}
    for k in CLASSES:
        run = run_partition(config, CYCLE, k)
        out[k] = {e.table: run.tables[e.table] for e in EXPORTS}
    return out


def _store(tmp: Path, tables, complete=CLASSES) -> Path:
    store = tmp / "store"
    s = open_store(store)
    s.begin(CYCLE, CLASSES, command="cycle")  # as a cycle run starts: every class pending
    for k in CLASSES:
        for name, frame in tables[k].items():
            write_partition(store, name, frame, CYCLE, k, run_id=f"run-{k}")
    for k in complete:
        s.complete_class(
            CYCLE, k, {t: s.latest(t, CYCLE, k) for t in tables[k]}, run_id=f"run-{k}", classes=CLASSES
        )
    return store


def _config(tmp: Path, store: Path) -> str:
    data = yaml.safe_load((ROOT / "config" / "planning.yaml").read_text())
    data["store"]["path"] = str(store)
    data["product_classes"] = {k: data["product_classes"][k] for k in CLASSES}
    path = tmp / "planning.yaml"
    path.write_text(yaml.safe_dump(data))
    return str(path)


def _read_csv(path: Path, columns: list[dict]) -> pa.Table:
    kinds = {"date": pa.date32(), "string": pa.string(), "float64": pa.float64(), "bool": pa.bool_()}
    types = {c["name"]: kinds[c["type"]] for c in columns}
    return pacsv.read_csv(
        path,
        convert_options=pacsv.ConvertOptions(
            column_types=types, strings_can_be_null=False, quoted_strings_can_be_null=False
        ),
    )


def test_export_writes_both_tables_and_a_manifest_that_matches_the_files(tmp_path, tables, capsys):
    store = _store(tmp_path, tables)
    config = _config(tmp_path, store)
    for fmt in ("parquet", "csv"):
        code = cli.main(["export", "--config", config, "--cycle", CYCLE, "--format", fmt, "--to", str(tmp_path / fmt)])
        assert code == cli.EXIT_OK
    out = capsys.readouterr().out
    assert "leaf_forecast.parquet" in out and "plan_measures.csv" in out
    read = {}
    for fmt in ("parquet", "csv"):
        folder = tmp_path / fmt
        manifest = json.loads((folder / MANIFEST).read_text())
        assert manifest["cycle"] == CYCLE and manifest["classes"] == CLASSES and manifest["file_format"] == fmt
        assert [f["name"] for f in manifest["files"]] == [f"leaf_forecast.{fmt}", f"plan_measures.{fmt}"]
        for f in manifest["files"]:
            path = folder / f["name"]
            # the loader's check, made with hashlib, not with the exporter's own function
            assert f["sha256"] == hashlib.sha256(path.read_bytes()).hexdigest()
            assert f["bytes"] == path.stat().st_size
            data = pq.read_table(path) if fmt == "parquet" else _read_csv(path, f["columns"])
            assert data.num_rows == f["rows"] == sum(f["rows_per_class"].values())
            assert data.column_names == [c["name"] for c in f["columns"]]
            if f["table"] == "leaf_forecast":  # the interval bounds of the config's levels (80 and 95) go too
                assert {"lower_80", "upper_80", "lower_95", "upper_95"} <= set(data.column_names)
            # rows per class as the stages made them
            source = {e.name: e.table for e in EXPORTS}[f["table"]]
            assert f["rows_per_class"] == {k: len(tables[k][source]) for k in CLASSES}
            read[fmt, f["table"]] = data
    for name in ("leaf_forecast", "plan_measures"):
        parquet, csv = read["parquet", name], read["csv", name]
        assert parquet.schema.equals(csv.schema)
        assert parquet.equals(csv), f"{name}: the CSV and the Parquet file differ"


def test_exported_values_are_the_stored_ones(tmp_path, tables):
    store = _store(tmp_path, tables)
    export_cycle(store, CYCLE, tmp_path / "out", "parquet", classes=["seasonal"], all_classes=CLASSES)
    got = pq.read_table(tmp_path / "out" / "leaf_forecast.parquet").to_pandas()
    made = tables["seasonal"]["statistical_forecast"]
    assert set(got["product_class"]) == {"seasonal"} and len(got) == len(made)
    keys = ["product", "site", "customer", "period_start"]
    got["period_start"] = got["period_start"].astype("datetime64[ns]")
    merged = made.merge(got, on=keys, suffixes=("", "_x"), validate="one_to_one")
    assert (merged["forecast"] == merged["forecast_x"]).all()
    assert (merged["parent_forecast"] == merged["parent_forecast_x"]).all()
    plan = pq.read_table(tmp_path / "out" / "plan_measures.parquet").to_pandas()
    assert len(plan) == len(tables["seasonal"]["plan_measures"]) and plan["measure"].nunique() > 1
    # sorted by class and keys: two exports of one publication give the same bytes
    assert got[keys].astype(str).apply(tuple, axis=1).is_monotonic_increasing
    first = (tmp_path / "out" / "plan_measures.parquet").read_bytes()
    export_cycle(store, CYCLE, tmp_path / "out", "parquet", classes=["seasonal"], all_classes=CLASSES)
    assert (tmp_path / "out" / "plan_measures.parquet").read_bytes() == first


def test_an_incomplete_cycle_is_refused_naming_the_missing_class(tmp_path, tables, capsys):
    store = _store(tmp_path, tables, complete=["consumables"])
    config = _config(tmp_path, store)
    code = cli.main(["export", "--config", config, "--cycle", CYCLE, "--format", "csv", "--to", str(tmp_path / "o")])
    assert code == cli.EXIT_BAD_INPUT == 2
    err = capsys.readouterr().err
    assert f"cycle {CYCLE} is not complete" in err and "seasonal: not complete" in err
    assert "consumables:" not in err  # the complete class is not named as missing
    assert not (tmp_path / "o").exists()
    with pytest.raises(ExportRefused, match="has never been run"):
        export_cycle(store, "2026-11-23", tmp_path / "o", all_classes=CLASSES)


def test_a_class_the_cycle_did_not_publish_is_refused(tmp_path, tables):
    store = _store(tmp_path, tables)
    with pytest.raises(ExportRefused, match="spares: not a class of the published cycle"):
        export_cycle(store, CYCLE, tmp_path / "o", classes=["spares"], all_classes=CLASSES)


def test_the_exported_columns_follow_the_tables_and_are_documented_in_the_readme():
    readme = (ROOT / "README.md").read_text()
    section = readme[readme.index("## Export") :]
    section = section[: section.index("\n## ", 4)]
    for spec in EXPORTS:
        # every column of the store table reaches the file (product_class added where the table lacks it)
        model = MODELS[spec.table].to_schema().columns
        # (not the integer ids: they number the keys within one stored partition; a file carries the text keys)
        stored = {n for n, c in model.items() if not c.regex and n not in (LEAF_ID, PARENT_ID)} | {"product_class"}
        assert set(spec.columns) == stored, spec.name
        # a regex column of the model (the interval bounds) is exported by the pattern that names it
        assert {n for n, c in model.items() if c.regex} <= ({spec.extra} if spec.extra else set()), spec.name
        documented = re.findall(rf"^\| `{spec.name}` \| `(\w+)` \| (\w+) \|", section, flags=re.M)
        assert documented == [(n, TYPE_NAMES[t]) for n, t in spec.columns.items()], spec.name
