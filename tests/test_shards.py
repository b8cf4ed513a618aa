"""Shards: a class cut into N partitions by a stable hash of its parents (pipelines/shards.py), and the same
leaf forecast whatever N is."""

import json
import os
import subprocess
import sys
from pathlib import Path

import dagster as dg
import pandas as pd
import pytest
import yaml
from stage_runs import DEMO, demo_config, run_partition

from pipelines.cycle_command import chosen_partitions
from pipelines.engines.class_rows import class_map, class_rows
from pipelines.errors import ConfigError
from pipelines.keys import LEAF_ID, PARENT_ID
from pipelines.shards import (
    PARENT_KEY,
    PRODUCT_KEY,
    Shard,
    partition_classes,
    shard_numbers,
    shard_of,
    split_class_key,
    store_shards,
)
from pipelines.stages.master_data import load_customer_spans, load_products

ROOT = Path(__file__).resolve().parents[1]
CYCLE = "2026-11-30"
# what a shard cannot decide alone, fixed: a strategy, a window and method, no seasonality group, no upper levels
FIXED = {
    "consumables": {"seasonality": "none"},
    "seasonal": {"window": 52, "method": "pooled", "strategy": "top_down", "seasonality": "none"},
    "spares": {"strategy": "mint_shrink", "seasonality": "none"},
}
NO_UPPER_LEVELS = {"upper_levels": []}


def _parents() -> pd.DataFrame:
    spans = load_customer_spans(DEMO)[0]
    return spans[["product", "site"]].drop_duplicates().reset_index(drop=True)


def test_a_parent_hashes_to_the_same_shard_in_every_process():
    # Python's hash() of a text is salted per process (PYTHONHASHSEED); a shard made from it would move between
    # the processes of one cycle. Two interpreters with different seeds must give this process's shards.
    parents = _parents()
    mine = shard_numbers(parents, PARENT_KEY, 8).tolist()
    code = (
        "import json, sys; from pipelines.stages.master_data import load_customer_spans; "
        "from pipelines.shards import shard_numbers, PARENT_KEY; "
        f"s = load_customer_spans({str(DEMO)!r})[0][['product', 'site']].drop_duplicates().reset_index(drop=True); "
        "print(json.dumps(shard_numbers(s, PARENT_KEY, 8).tolist()))"
    )
    for seed in ("1", "2"):
        env = {**os.environ, "PYTHONHASHSEED": seed, "PYTHONPATH": str(ROOT)}
        out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, check=True)
        assert json.loads(out.stdout) == mine
    # every shard holds some parents: 8 shards over the demo's ~250 parents, each within half of the mean
    # either way (common practice, no source: a binomial count's spread is about the root of the mean)
    counts = pd.Series(mine).value_counts()
    assert sorted(counts.index) == list(range(1, 9))
    assert counts.between(0.5 * len(mine) / 8, 1.5 * len(mine) / 8).all()


@pytest.mark.parametrize("by", [PARENT_KEY, PRODUCT_KEY])
def test_every_row_of_a_class_lands_in_exactly_one_shard(by):
    spans = load_customer_spans(DEMO)[0]
    classes = class_map(load_products(DEMO)[0])
    whole = class_rows(spans, classes, "consumables", keep_index=True)
    cut = [class_rows(spans, classes, "consumables", keep_index=True, shard=Shard(i, 8, by)) for i in range(1, 9)]
    together = pd.concat(cut)
    # every row once: no row lost, none in two shards
    assert sorted(together.index) == sorted(whole.index) and together.index.is_unique
    # a parent (a product, when hashed on the product) in one shard only
    shard_of_row = pd.concat([c.assign(shard=i) for i, c in enumerate(cut, 1)])
    assert (shard_of_row.groupby(list(by))["shard"].nunique() == 1).all()
    assert (shard_of_row.groupby(list(PARENT_KEY))["shard"].nunique() == 1).all()


def test_partition_keys_name_each_shard_and_refuse_another_count():
    config = demo_config(FIXED, hierarchy=NO_UPPER_LEVELS, scale={"shards": 2})
    assert partition_classes(config) == [
        "consumables~1of2", "consumables~2of2", "seasonal~1of2", "seasonal~2of2", "spares~1of2", "spares~2of2",
    ]
    own = demo_config({**FIXED, "spares": {**FIXED["spares"], "scale": {"shards": 3}}}, hierarchy=NO_UPPER_LEVELS)
    assert partition_classes(own) == ["consumables", "seasonal", "spares~1of3", "spares~2of3", "spares~3of3"]
    assert store_shards(own, "consumables") == ["0"] and store_shards(own, "spares") == ["1of3", "2of3", "3of3"]
    assert split_class_key("spares~2of3") == ("spares", "2of3") and split_class_key("spares") == ("spares", "0")
    assert shard_of(own, "spares~2of3") == Shard(2, 3, PARENT_KEY) and shard_of(own, "seasonal") is None
    with pytest.raises(ConfigError, match="shard 2 of 4.*scale.shards 3"):
        shard_of(own, "spares~2of4")
    with pytest.raises(ConfigError, match="cut into 3 shards"):
        shard_of(own, "spares")
    with pytest.raises(ConfigError, match="CLASS~IofN"):
        split_class_key("spares~5of3")
    # --class spares runs its three shards, --class spares~2of3 that one
    assert chosen_partitions(own, ["spares"]) == ["spares~1of3", "spares~2of3", "spares~3of3"]
    assert chosen_partitions(own, ["spares~2of3", "seasonal"]) == ["spares~2of3", "seasonal"]
    with pytest.raises(ConfigError, match="not under product_classes"):
        chosen_partitions(own, ["spares~2of4"])


@pytest.mark.parametrize(
    "keys, named",
    [
        ({"strategy": "auto"}, "strategy: auto"),
        ({"window": "auto"}, "window/method: auto"),
        ({"seasonality": "auto"}, "seasonality: auto"),
        ({"seasonality": "group", "seasonal_group": "product_family"}, "seasonal_group: product_family"),
    ],
)
def test_a_class_cut_into_shards_may_not_need_the_whole_class(keys, named):
    spares = {**FIXED["spares"], **keys, "scale": {"shards": 2}}
    with pytest.raises(ConfigError, match=f"'spares' is cut into 2 shards.*{named}"):
        demo_config({**FIXED, "spares": spares}, hierarchy=NO_UPPER_LEVELS)
    with pytest.raises(ConfigError, match="hierarchy.upper_levels"):
        demo_config({**FIXED, "spares": {**FIXED["spares"], "scale": {"shards": 2}}})
    # one shard is the class as before: every key allowed
    demo_config({**FIXED, "spares": {**FIXED["spares"], **keys, "scale": {"shards": 1}}})


def test_group_seasonality_by_product_keeps_a_products_sites_in_one_shard():
    spares = {**FIXED["spares"], "seasonality": "group", "seasonal_group": "product", "scale": {"shards": 4}}
    config = demo_config({**FIXED, "spares": spares}, hierarchy=NO_UPPER_LEVELS)
    assert shard_of(config, "spares~1of4").by == PRODUCT_KEY


LEAF_KEYS = ["product", "site", "customer", "period_start"]


def _sorted(frame: pd.DataFrame) -> pd.DataFrame:
    # the integer ids number the keys within one partition's tables (pipelines.keys), so a shard's differ from the
    # whole class's; the keys they stand for are compared
    frame = frame.drop(columns=[LEAF_ID, PARENT_ID], errors="ignore")
    keys = [c for c in LEAF_KEYS + ["measure", "origin", "source_product", "source_customer"] if c in frame.columns]
    return frame.sort_values(keys).reset_index(drop=True)


def test_eight_shards_give_the_whole_class_leaf_forecast_to_the_last_bit():
    # spares reconciles by MinT (shrunk covariance of each parent's children): per parent, so the shards of a
    # class add up to it exactly; the same rows in another order, compared without tolerance
    whole = run_partition(demo_config(FIXED, hierarchy=NO_UPPER_LEVELS), CYCLE, "spares")
    config = demo_config(FIXED, hierarchy=NO_UPPER_LEVELS, scale={"shards": 8})
    shards = [run_partition(config, CYCLE, key) for key in partition_classes(config, ["spares"])]
    for table in ("statistical_forecast", "parent_forecast", "reconciliation", "share_tables", "plan_measures"):
        together = pd.concat([s.tables[table] for s in shards], ignore_index=True)
        pd.testing.assert_frame_equal(_sorted(together), _sorted(whole.tables[table]), check_exact=True)
    # every shard's history range is the class's (its grid and fill ranges start there), even one whose own
    # lines start later or that has none
    for s in shards:
        pd.testing.assert_frame_equal(s.tables["cycle_calendar"], whole.tables["cycle_calendar"], check_exact=True)
    assert sum(len(s.tables["reconciliation"]) > 0 for s in shards) >= 7  # (nearly) every shard had parents
    # and a parent's rows are in one shard only
    leaf = pd.concat([s.tables["statistical_forecast"].assign(shard=i) for i, s in enumerate(shards)])
    assert (leaf.groupby(["product", "site"])["shard"].nunique() == 1).all()


@pytest.mark.graph
def test_the_last_shard_to_finish_completes_the_class(tmp_path):
    from pipelines.definitions import build_definitions
    from pipelines.resources import read_table
    from pipelines.runner import run_partitions
    from pipelines.store import open_store

    data = yaml.safe_load((ROOT / "config" / "planning.yaml").read_text())
    data["inputs"]["folder"] = str(DEMO)
    data["store"]["path"] = str(tmp_path / "store")
    data["hierarchy"] = NO_UPPER_LEVELS
    for name, keys in FIXED.items():
        data["product_classes"][name].update(keys)
    data["product_classes"]["spares"]["scale"] = {"shards": 2}
    path = tmp_path / "planning.yaml"
    path.write_text(yaml.safe_dump(data))
    defs, instance = build_definitions(str(path)), dg.DagsterInstance.ephemeral()
    every = ["consumables", "seasonal", "spares~1of2", "spares~2of2"]
    store = open_store(tmp_path / "store")
    first = run_partitions(defs, instance, CYCLE, ["spares~1of2"], all_classes=every)
    assert first.success and store.class_record(CYCLE, "spares")["state"] == "pending"  # waits for shard 2
    second = run_partitions(defs, instance, CYCLE, ["spares~2of2"], all_classes=every)
    assert second.success and store.class_record(CYCLE, "spares")["state"] == "complete"
    record = store.class_record(CYCLE, "spares")["tables"]["statistical_forecast"]
    assert sorted(record) == ["1of2", "2of2"]
    leaf = read_table(store.root, "statistical_forecast", cycle=CYCLE, product_class="spares", versions="complete")
    one = read_table(store.root, "statistical_forecast", cycle=CYCLE, product_class="spares", versions="complete",
                     shard="1of2")
    assert 0 < len(one) < len(leaf) and leaf[["product", "site"]].drop_duplicates().shape[0] > 1


def test_a_shard_proves_its_own_versions_and_waits_for_the_others():
    from pipelines.publication import unproven_versions, waiting_shards

    versions = pd.DataFrame({
        "asset": ["statistical_forecast"] * 3,
        "shard": ["1of3", "2of3", "3of3"],
        "run_id": ["a", "b", ""],
        "proven": [True, False, False],
        "proof": ["written and checked in this run", "a blocking check failed", "never written"],
    })
    # shard 1's run: nothing of its own unproven (its check passes), the class waits for shards 2 and 3
    assert unproven_versions(versions, "1of3").empty and waiting_shards(versions, "1of3") == ["2of3", "3of3"]
    # shard 2's run: its own version is unproven, a failure of that run
    assert list(unproven_versions(versions, "2of3")["shard"]) == ["2of3"]
    # a class not cut: every version is its own, nothing to wait for
    assert len(unproven_versions(versions)) == 2 and waiting_shards(versions, None) == []


def test_three_shards_keep_a_successor_chain_with_its_history():
    # the demo's seasonal class hands a retired product's history over to its successor TIMR-004 at each site
    # (data/demo/README.md, case 3): a shard hashing the predecessor apart from its successor loses that history
    # (own_periods 156 -> 44 for TIMR-004's customers at SITE-WEST when tried); hashed by the chain's end, three
    # shards give the whole class's tables to the last bit
    whole = run_partition(demo_config(FIXED, hierarchy=NO_UPPER_LEVELS), CYCLE, "seasonal")
    config = demo_config(FIXED, hierarchy=NO_UPPER_LEVELS, scale={"shards": 3})
    shards = [run_partition(config, CYCLE, key) for key in partition_classes(config, ["seasonal"])]
    for table in ("lifecycle_history", "share_tables", "statistical_forecast", "reconciliation"):
        together = pd.concat([s.tables[table] for s in shards], ignore_index=True)
        pd.testing.assert_frame_equal(_sorted(together), _sorted(whole.tables[table]), check_exact=True)
