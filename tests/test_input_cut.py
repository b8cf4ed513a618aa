"""The history cut once per cycle (pipelines/input_cut.py): the same tables as reading the whole history in every
partition, one read per cycle, remade when an input changes, cut once by processes starting together, nothing
partial left by a killed cutter.

The reference for "the same tables" is the project's own path without the cut (`scale.cut_inputs: false`), which
every earlier release ran; the comparison is benchmarks/compare_stores.py's, cell by cell without tolerance.
"""

import json
import shutil
import subprocess
import sys
from pathlib import Path

import dagster as dg
import pandas as pd
import pyarrow.parquet as pq
import pytest
from stage_runs import DEMO, FIXED, demo_config, sharded_demo_file

from pipelines.calendar import period_ordinal
from pipelines.engines.class_rows import class_map, class_rows, history_figures
from pipelines.engines.cleansing import reject_lines
from pipelines.engines.history_files import load_raw_history
from pipelines.input_cut import SUMMARY, CutPart, class_first_period, cycle_folder, ensure_cut, part_path, write_cut
from pipelines.partitions import narrow_config
from pipelines.shards import partition_classes, shard_of, split_class_key, successor_ends
from pipelines.stages.master_data import load_customer_spans, load_products

ROOT = Path(__file__).resolve().parents[1]
CYCLE = "2026-11-30"


def _config(tmp: Path, folder: Path = DEMO, shards: int = 3):
    return demo_config(FIXED, hierarchy={"upper_levels": []}, scale={"shards": shards},
                       inputs={"folder": str(folder)}, store={"path": str(tmp / "store")})


def test_each_part_holds_the_rows_its_partition_keeps_of_the_whole_history(tmp_path):
    config = _config(tmp_path)
    lines = load_raw_history(DEMO)[0]
    products = load_products(DEMO)[0]
    classes, ends = class_map(products), successor_ends(products)
    for key in partition_classes(config):  # 3 classes x 3 shards
        name, shard = split_class_key(key)
        own = shard_of(config, key)
        want = class_rows(lines, classes, name, shard=type(own)(own.index, own.count, own.by, ends))
        got, figures = CutPart(tmp_path / "store", config, CYCLE, name, shard).lines()
        pd.testing.assert_frame_equal(got, want, check_exact=True)  # every cell, file and row, in order
        assert figures["lines_in_files"] == len(lines) and figures["files"][0]["rows"] == len(lines)
    # a line of a product in no class is in every class: the class lines sum to the file's lines plus the copies
    summary = CutPart(tmp_path / "store", config, CYCLE, "spares", "1of3").summary()
    no_class = int(lines["product"].map(classes).isna().sum())
    assert no_class >= 1
    total = sum(CutPart(tmp_path / "store", config, CYCLE, k, "1of3").summary()["lines"] for k in FIXED)
    assert total == len(lines) + 2 * no_class and sum(summary["shards"].values()) == summary["lines"]


def test_a_changed_input_file_remakes_the_cut(tmp_path):
    folder = tmp_path / "inputs"
    shutil.copytree(DEMO, folder)
    config = _config(tmp_path, folder)
    first, made = ensure_cut(tmp_path / "store", config, CYCLE)
    assert made and (first / SUMMARY).exists()
    assert ensure_cut(tmp_path / "store", config, CYCLE) == (first, False)  # the same inputs: read, not cut
    history = folder / "history.csv"
    text = history.read_text().splitlines(keepends=True)
    history.write_text("".join(text[:-1]))  # the last line gone
    second, made = ensure_cut(tmp_path / "store", config, CYCLE)
    assert made and second != first and not first.exists()  # the old cut deleted once the new one is in place
    recorded = {f[0]: f[1] for f in json.loads((second / SUMMARY).read_text())["decided_by"]["files"]}
    assert recorded["history.csv"] == history.stat().st_size  # what decided it, in its summary
    lines = sum(CutPart(tmp_path / "store", config, CYCLE, k, "1of3").summary()["lines"] for k in FIXED)
    assert lines == len(text) - 1 + 2 - 1  # one line fewer (+2 for the line of no class kept in 3 classes)


def _awkward_inputs(tmp: Path) -> Path:
    """The demo's inputs with its history as three files (one Parquet) and the lines a chunked read could get
    wrong: every 40th demo line; 15 lines repeated in a later file (`duplicate_of_other_file`, a rule over the
    leaf's lines of all files); three lines of known leaves dated years before the rest (`isolated_date`, a rule
    over the class's lines per period); blank, malformed, quoted and over-long lines (longer than a chunk)."""
    folder = tmp / "inputs"
    shutil.copytree(DEMO, folder)
    header, *body = (folder / "history.csv").read_text().splitlines()
    some = body[::40]
    half = len(some) // 2
    early = [",".join(line.split(",")[:3] + ["2020-06-01", "5"]) for line in some[100:103]]
    odd = ["", "A,B,C,D,E,F", '"DRIP-001",SITE-NORTH,"C0002",2024-01-02,3', "P,S,C,2024-01-01," + "9" * 5000, ""]
    (folder / "history.csv").write_text("\n".join([header, *some[:half]]) + "\n")
    (folder / "history_2.csv").write_text("\n".join([header, *some[half:-60], *odd, *early, *some[:15]]) + "\n")
    rows = [line.split(",") for line in some[-60:]]
    pd.DataFrame(rows, columns=header.split(",")).to_parquet(folder / "history_3.parquet", row_group_size=7)
    return folder


def test_a_cut_in_tiny_chunks_equals_the_cut_in_one_piece_and_the_whole_history(tmp_path):
    folder = _awkward_inputs(tmp_path)
    config = _config(tmp_path, folder)
    made = {}
    for size in (4096, 1 << 30):  # about 80 lines (a Parquet batch of 64 rows) a chunk; one chunk per file
        made[size] = (tmp_path / f"cut-{size}", write_cut(tmp_path / f"cut-{size}", config, CYCLE, "x", size))
    (small, by_chunks), (whole, in_one) = made.values()
    assert by_chunks == in_one
    # the whole history in one frame, as the cut read it before it was chunked (the reference)
    lines, files = load_raw_history(folder, config.inputs)
    products, spans = load_products(folder)[0], load_customer_spans(folder)[0]
    classes, ends = class_map(products), successor_ends(products)
    no_class = int(lines["product"].map(classes).isna().sum())
    assert in_one["history"] == history_figures(config.inputs, files, len(lines), no_class)
    assert {f["file"]: (f["malformed"], f["blank_lines"]) for f in in_one["history"]["files"]}["history_2.csv"] == (
        1, 2)
    for key in partition_classes(config):
        name, shard = split_class_key(key)
        own = shard_of(config, key)
        want = class_rows(lines, classes, name, shard=type(own)(own.index, own.count, own.by, ends))
        for cut in (small, whole):  # every cell, file and row, in order
            got = pq.read_table(part_path(cut, name, shard)).to_pandas()
            pd.testing.assert_frame_equal(got, want, check_exact=True)
    early = int(period_ordinal(pd.DatetimeIndex(["2020-06-01"]), config.calendar.period)[0])
    reasons = set()
    for k in FIXED:  # the class's first trusted period as reject_lines finds it on all the class's lines at once
        narrowed = narrow_config(config, CYCLE, k)
        raw = class_rows(lines, classes, k)
        first = class_first_period(raw, products, classes, spans, narrowed, k)
        assert by_chunks["classes"][k]["first_period"] == first and first > early
        assert by_chunks["classes"][k]["first_period_known"]
        reasons |= set(reject_lines(raw, products[products["product_class"] == k], class_rows(spans, classes, k),
                                    narrowed.calendar, narrowed.source, narrowed.inputs.plausible)[1]["reason"])
    # the rules over a leaf's lines in every file and over the class's lines per period took part
    assert {"duplicate_of_other_file", "isolated_date", "too_many_fields"} <= reasons


RACE = """
import sys, time
from pathlib import Path
sys.path.insert(0, {tests!r})
from test_input_cut import _config
from pipelines.input_cut import ensure_cut
config = _config(Path({tmp!r}))
print("ready", flush=True)
while not Path({go!r}).exists():
    time.sleep(0.01)
print("made" if ensure_cut(config.store.path, config, {cycle!r})[1] else "read", flush=True)
"""


def test_two_processes_starting_together_cut_once(tmp_path):
    # tests/test_concurrency.py's way: real processes, released together once both are ready
    go = tmp_path / "go"
    script = RACE.format(tests=str(ROOT / "tests"), tmp=str(tmp_path), go=str(go), cycle=CYCLE)
    procs = [subprocess.Popen([sys.executable, "-c", script], cwd=ROOT, stdout=subprocess.PIPE, text=True)
             for _ in range(2)]
    for p in procs:
        assert p.stdout.readline().strip() == "ready"
    go.touch()
    said = sorted(p.communicate(timeout=120)[0].strip() for p in procs)
    assert [p.returncode for p in procs] == [0, 0]
    assert said == ["made", "read"]  # one cut, the other waited for it and read
    assert len([p for p in cycle_folder(tmp_path / "store", CYCLE).iterdir()]) == 1


KILLED = """
import os, signal, sys
from pathlib import Path
sys.path.insert(0, {tests!r})
from test_input_cut import _config
import pipelines.input_cut as cut
written = []
real = cut.finish_part
def write_then_die(path, writer):
    real(path, writer)
    written.append(path)
    if len(written) == 2:
        print(path, flush=True)
        os.kill(os.getpid(), signal.SIGKILL)  # killed in the middle of the cut: two parts written, the rest not
cut.finish_part = write_then_die
config = _config(Path({tmp!r}))
cut.ensure_cut(config.store.path, config, {cycle!r})
"""


def test_a_killed_cutter_leaves_no_part_and_the_next_one_cuts(tmp_path):
    script = KILLED.format(tests=str(ROOT / "tests"), tmp=str(tmp_path), cycle=CYCLE)
    done = subprocess.run([sys.executable, "-c", script], cwd=ROOT, capture_output=True, text=True, timeout=120)
    assert done.returncode == -9, done.stderr
    written = Path(done.stdout.strip())
    assert written.exists() and ".tmp-" in str(written)  # the part it wrote lies in its temporary folder only
    root = cycle_folder(tmp_path / "store", CYCLE)
    assert [p.name.startswith(".tmp-") for p in root.iterdir()] == [True]  # no cut a reader would open
    config = _config(tmp_path)
    folder, made = ensure_cut(tmp_path / "store", config, CYCLE)
    assert made and [p.name for p in root.iterdir()] == [folder.name]  # the dead cutter's folder deleted


def _graph_config(tmp: Path, cut: bool) -> str:
    return sharded_demo_file(tmp, scale={"cut_inputs": cut})


@pytest.mark.graph
def test_the_demo_tables_are_identical_with_the_cut_and_without_and_the_history_is_read_once(tmp_path, monkeypatch):
    import assets.cleaned_history
    import pipelines.input_cut
    import pipelines.stages.raw_history
    from benchmarks.compare_stores import compare
    from pipelines.definitions import build_definitions
    from pipelines.runner import run_partitions

    reads = []
    for module, name in ((pipelines.input_cut, "iter_raw_history"), (pipelines.stages.raw_history, "load_raw_history"),
                         (assets.cleaned_history, "load_raw_history")):
        real = getattr(module, name)
        monkeypatch.setattr(module, name, lambda *a, _m=module.__name__, _r=real, **k: reads.append(_m) or _r(*a, **k))
    keys = ["consumables", "seasonal", "spares~1of2", "spares~2of2"]
    tmp = tmp_path / "run"  # both runs in one folder: the report's path, a column of cycle_report, is the same
    stores = {}
    for cut in (False, True):
        tmp.mkdir()
        reads.clear()
        result = run_partitions(build_definitions(_graph_config(tmp, cut)), dg.DagsterInstance.ephemeral(), CYCLE,
                                keys, say=None)
        assert result.success, f"cut={cut}"
        stores[cut] = (tmp.rename(tmp_path / ("cut" if cut else "whole")) / "store", sorted(reads))
    # without the cut: every partition reads the whole history, each shard once more for the class's first period
    assert stores[False][1] == sorted(["pipelines.stages.raw_history"] * 4 + ["assets.cleaned_history"] * 2)
    # with it: one read for the cycle, by the cut
    assert stores[True][1] == ["pipelines.input_cut"]
    assert len(list(cycle_folder(stores[True][0], CYCLE).iterdir())) == 1
    assert not (stores[False][0] / "cut").exists()
    assert compare(stores[False][0], stores[True][0]) == 0  # every published table, cell by cell
