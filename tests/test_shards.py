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
from stage_runs import DEMO, FIXED, class_step_runs, demo_config, run_partition, sharded_demo_file, spares_auto_runs

from pipelines.cycle_command import chosen_partitions
from pipelines.engines.class_rows import class_map, class_rows
from pipelines.errors import ConfigError
from pipelines.keys import LEAF_ID, PARENT_ID
from pipelines.shards import (
    PARENT_KEY,
    PRODUCT_KEY,
    Shard,
    needs_class_step,
    partition_classes,
    shard_numbers,
    shard_of,
    split_class_key,
    store_shards,
)
from pipelines.stages.master_data import load_customer_spans, load_products

ROOT = Path(__file__).resolve().parents[1]
CYCLE = "2026-11-30"
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
        ({"window": "auto"}, "window/method: auto"),
        ({"seasonality": "group", "seasonal_group": "product_family"}, "seasonal_group: product_family"),
        ({"seasonality": "auto", "seasonal_group": "product_class"}, "seasonal_group: product_class"),
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
    # seasonality auto may choose the group by product: hashed the same way, and decided over the class
    auto = demo_config({**FIXED, "spares": {**spares, "seasonality": "auto"}}, hierarchy=NO_UPPER_LEVELS)
    assert shard_of(auto, "spares~1of4").by == PRODUCT_KEY and needs_class_step(auto, "spares")


def test_a_class_cut_into_shards_may_decide_its_strategy_over_the_class_in_two_phases():
    from pipelines.definitions import build_definitions
    from pipelines.phases import FROM_CHOICE, TO_BACKTEST, every_shard_on, phase_selection, run_count, run_plan
    from pipelines.runner import rebuild_selection

    config = demo_config({**FIXED, "spares": {**FIXED["spares"], "strategy": "auto", "scale": {"shards": 2}}},
                         hierarchy=NO_UPPER_LEVELS)
    assert needs_class_step(config, "spares") and not needs_class_step(config, "seasonal")
    keys = ["seasonal", "spares~1of2", "spares~2of2"]
    first, second = run_plan(config, keys)
    assert [r.label for r in first] == ["seasonal", "spares~1of2 (to backtest)", "spares~2of2 (to backtest)"]
    assert [r.label for r in second] == ["spares~1of2 (from strategy_choice)", "spares~2of2 (from strategy_choice)"]
    assert run_plan(config, ["seasonal"]) == [first[:1]]  # a class without the class-level step: one run
    # one shard's backtest rerun (`--class spares~2of2`) changes the class's decision: when every shard has a
    # backtest, every shard goes on from strategy_choice; while one is missing, only the shard run (it then says
    # which shard is missing)
    _, alone = run_plan(config, ["spares~2of2"])
    widened = every_shard_on(config, alone, lambda name: {"1of2", "2of2"})
    assert [r.label for r in widened] == ["spares~2of2 (from strategy_choice)", "spares~1of2 (from strategy_choice)"]
    assert every_shard_on(config, alone, lambda name: {"2of2"}) == alone
    graph = build_definitions(str(ROOT / "config" / "planning.yaml")).resolve_asset_graph()
    names = {phase: {k.to_user_string() for k in phase_selection(graph, phase, None)} for phase in
             (TO_BACKTEST, FROM_CHOICE)}
    # the two phases share no asset and together are the whole graph
    assert not names[TO_BACKTEST] & names[FROM_CHOICE]
    assert names[TO_BACKTEST] | names[FROM_CHOICE] == {k.to_user_string() for k in graph.get_all_asset_keys()}
    assert {"cleaned_history", "backtest_accuracy", "backtest_losses", "share_tuning"} <= names[TO_BACKTEST]
    assert {"strategy_choice", "statistical_forecast", "publication"} <= names[FROM_CHOICE]
    # `rebuild --from`: each phase keeps what the rebuild selects, a phase with nothing of it does not run
    defs = build_definitions(str(ROOT / "config" / "planning.yaml"))
    wanted = rebuild_selection(defs, "lifecycle_history")
    before = {k.to_user_string() for k in phase_selection(graph, TO_BACKTEST, wanted)}
    assert before == {"lifecycle_history", "lifecycle_audit", "backtest_accuracy", "backtest_losses", "share_tuning"}
    assert phase_selection(graph, TO_BACKTEST, rebuild_selection(defs, "share_tables")) == []
    assert run_count(config, keys, graph, rebuild_selection(defs, "share_tables")) == 3  # seasonal, 2 second phases


def test_a_missing_shard_backtest_stops_the_class_step_naming_the_shard_and_the_command(tmp_path):
    from assets.factory import Partition
    from pipelines.errors import ShardsMissing
    from pipelines.partitions import narrow_config
    from pipelines.store import open_store

    spares = {**FIXED["spares"], "strategy": "auto", "scale": {"shards": 3}}
    config = demo_config({**FIXED, "spares": spares}, hierarchy=NO_UPPER_LEVELS,
                         store={"path": str(tmp_path / "store")})
    table = pd.DataFrame({"product_class": ["spares"], "value": [1.0]})
    open_store(tmp_path / "store").write("backtest_losses", CYCLE, "spares", table, shard="2of3")
    part = Partition(narrow_config(config, CYCLE, "spares~2of3"), config, CYCLE, "spares", shard_of(config,
                                                                                                    "spares~2of3"))
    with pytest.raises(ShardsMissing, match=r"\['spares~1of3', 'spares~3of3'\].*python -m pipelines cycle "
                                            r"--cycle 2026-11-30 --class spares"):
        part.siblings("backtest_losses")
    for shard in ("1of3", "3of3"):
        open_store(tmp_path / "store").write("backtest_losses", CYCLE, "spares", table.assign(value=2.0), shard=shard)
    found = part.siblings("backtest_losses")
    assert list(found) == ["1of3", "2of3", "3of3"] and [f["value"].iloc[0] for f in found.values()] == [2, 1, 2]


def test_eight_shards_choose_the_whole_class_strategy_and_give_its_leaf_forecast_to_the_last_bit():
    # strategy: auto over eight shards: each shard's backtest sums combined (pipelines/engines/backtest_combine.py)
    # decide as the whole class does
    runs = spares_auto_runs(8)
    choices = [r.tables["strategy_choice"] for r in runs.shards]
    for choice in choices[1:]:  # every shard stores the same class-level row, bit for bit
        pd.testing.assert_frame_equal(choice, choices[0], check_exact=True)
    mine, whole = choices[0], runs.whole.tables["strategy_choice"]
    assert mine["configured_strategy"].tolist() == ["auto"] and len(mine) == 1
    # the scores are ratios of float sums the shards add in another order: the same to 1e-12 relative (seen
    # 2e-15; `tests/test_backtest_combine.py`); the rest (the choice, runner-up, reason) exactly
    ratios = ["leaf_wmape", "margin", "seasonal_naive_wmape", "score", "leaf_rmsse", "p_value"]
    pd.testing.assert_frame_equal(mine.drop(columns=ratios), whole.drop(columns=ratios), check_exact=True)
    pd.testing.assert_frame_equal(mine[ratios], whole[ratios], check_exact=False, rtol=1e-12, atol=0)
    # the scores are the class's, not a shard's: shard 1's own backtest gives the chosen strategy another WMAPE
    own = runs.shards[0].tables["backtest_accuracy"].query("grain == 'leaf' and metric == 'wmape'")
    alone = own.set_index("strategy")["value"][mine["strategy"].iloc[0]]
    assert abs(alone - mine["leaf_wmape"].iloc[0]) > 1e-3 and mine["runner_up"].iloc[0] != mine["strategy"].iloc[0]
    for table in ("statistical_forecast", "parent_forecast", "reconciliation", "plan_measures"):
        together = pd.concat([r.tables[table] for r in runs.shards], ignore_index=True)
        pd.testing.assert_frame_equal(_sorted(together), _sorted(runs.whole.tables[table]), check_exact=True)


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


def test_readers_show_a_fixed_sharded_class_once_with_the_whole_class_figures(tmp_path):
    # a fixed strategy decides nothing over the class, so each shard's strategy_choice holds its own backtest's
    # figures; the summary and the cycle page show the class once, with the whole class's (pipelines.class_view)
    from pipelines.class_view import class_choice
    from pipelines.store import open_store

    whole = run_partition(demo_config(FIXED, hierarchy=NO_UPPER_LEVELS), CYCLE, "spares", backtest=True,
                          upto="strategy_choice")
    config = demo_config(FIXED, hierarchy=NO_UPPER_LEVELS, scale={"shards": 3})
    shards = [run_partition(config, CYCLE, key, backtest=True, upto="strategy_choice")
              for key in partition_classes(config, ["spares"])]
    folder = tmp_path / "store"
    store = open_store(folder)
    for key, s in zip(partition_classes(config, ["spares"]), shards, strict=True):
        for table in ("strategy_choice", "backtest_accuracy"):
            store.write(table, CYCLE, "spares", s.tables[table], shard=key.split("~")[1])
    stored = pd.concat([s.tables["strategy_choice"] for s in shards], ignore_index=True)
    assert stored["leaf_wmape"].nunique() > 1  # the shards' own figures differ
    shown = class_choice(folder, config, CYCLE, stored, versions="latest")
    assert len(class_choice(folder, config, CYCLE, stored.iloc[[0]], versions="latest")) == 1
    mine = whole.tables["strategy_choice"]
    assert len(shown) == 1 and shown["decision"].tolist() == ["fixed"]
    # ratios of float sums the shards add in another order: to 1e-12 relative; the rest exactly
    figures = ["leaf_wmape", "leaf_rmsse", "score", "seasonal_naive_wmape"]
    pd.testing.assert_frame_equal(shown[figures], mine[figures], check_exact=False, rtol=1e-12, atol=0)
    rest = [c for c in mine.columns if c not in figures]
    pd.testing.assert_frame_equal(shown[rest], mine[rest], check_exact=True)


@pytest.mark.graph
def test_the_last_shard_to_finish_completes_the_class(tmp_path):
    from pipelines.definitions import build_definitions
    from pipelines.resources import read_table
    from pipelines.runner import run_partitions
    from pipelines.store import open_store

    path = sharded_demo_file(tmp_path)
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


@pytest.mark.graph
def test_the_runner_backtests_every_shard_before_any_decides(tmp_path):
    from pipelines.definitions import build_definitions
    from pipelines.engines.backtest_combine import combine_accuracy
    from pipelines.resources import read_table
    from pipelines.runner import PartitionOutcome, run_partitions
    from pipelines.store import open_store

    # a small backtest: two strategies
    path = sharded_demo_file(tmp_path, {"strategy": "auto"}, backtest={"origins": 2,
                                                                       "strategies": ["top_down", "bottom_up"]})
    defs, instance = build_definitions(str(path)), dg.DagsterInstance.ephemeral()
    every = ["consumables", "seasonal", "spares~1of2", "spares~2of2"]
    # shard 1 alone: its backtest runs, its strategy_choice stops on shard 2's missing backtest, saying what to run
    alone = run_partitions(defs, instance, CYCLE, ["spares~1of2"], all_classes=every, say=None)
    assert list(alone.results) == ["spares~1of2 (to backtest)", "spares~1of2 (from strategy_choice)"]
    assert alone.results["spares~1of2 (to backtest)"].success
    failed = PartitionOutcome.from_result("spares~1of2", alone.results["spares~1of2 (from strategy_choice)"], 0)
    assert not failed.success and failed.failure_kinds == ["bad_input"]
    assert "['spares~2of2']" in failed.failures[0][1] and "--class spares" in failed.failures[0][1]
    # every class: the whole runs and both shards' backtests first, then both shards on from strategy_choice
    both = run_partitions(defs, instance, CYCLE, every, all_classes=every, say=None)
    assert list(both.results) == ["consumables", "seasonal", "spares~1of2 (to backtest)", "spares~2of2 (to backtest)",
                                  "spares~1of2 (from strategy_choice)", "spares~2of2 (from strategy_choice)"]
    assert both.success and open_store(tmp_path / "store").published(CYCLE) is not None
    # the cycle's page: the class's charts drawn from both shards, not each shard's
    page = (tmp_path / "reports" / CYCLE / "cycle_report.html").read_text()
    assert "parents_spares_2026-11-30.png" in page and "parents_spares-1of2" not in page
    assert "parents_consumables_2026-11-30.png" in page
    choice = [read_table(tmp_path / "store", "strategy_choice", cycle=CYCLE, product_class="spares",
                         versions="complete", shard=s) for s in ("1of2", "2of2")]
    pd.testing.assert_frame_equal(choice[0], choice[1], check_exact=True)  # one class-level row, in every shard
    assert choice[0]["configured_strategy"].tolist() == ["auto"]
    # decided from both shards' backtests combined: its WMAPE is theirs, bit for bit, and neither shard's own
    shards = [read_table(tmp_path / "store", "backtest_accuracy", cycle=CYCLE, product_class="spares",
                         versions="complete", shard=s) for s in ("1of2", "2of2")]
    chosen = f"grain == 'leaf' and metric == 'wmape' and strategy == '{choice[0]['strategy'].iloc[0]}'"
    combined = combine_accuracy(shards).query(chosen)["value"].iloc[0]
    assert choice[0]["leaf_wmape"].iloc[0] == combined
    assert all(s.query(chosen)["value"].iloc[0] != combined for s in shards)


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


def test_four_shards_choose_the_whole_class_seasonality_by_product():
    # consumables (the demo's `seasonality: auto`, group by product) backtests none against the product's group
    # index; each shard holds whole products (hashed on the product), so every candidate's sums add over shards
    classes = {**FIXED, "consumables": {"seasonality": "auto", "seasonal_group": "product"}}
    whole = demo_config(classes, hierarchy=NO_UPPER_LEVELS)
    cut = demo_config(classes, hierarchy=NO_UPPER_LEVELS, scale={"shards": 4})
    runs = class_step_runs(whole, cut, CYCLE, "consumables")
    assert set(runs.accuracy["seasonality"]) == {"none", "group"}  # both candidates backtested, in every shard
    mine, theirs = runs.shards[0].tables["strategy_choice"], runs.whole.tables["strategy_choice"]
    ratios = ["leaf_wmape", "margin", "seasonal_naive_wmape", "score", "leaf_rmsse", "p_value"]
    # the choice exactly; its scores to 1e-12 relative (float sums added in another order; seen 1e-14)
    pd.testing.assert_frame_equal(mine.drop(columns=ratios), theirs.drop(columns=ratios), check_exact=True)
    pd.testing.assert_frame_equal(mine[ratios], theirs[ratios], check_exact=False, rtol=1e-12, atol=0)
    for table in ("statistical_forecast", "parent_forecast"):
        together = pd.concat([r.tables[table] for r in runs.shards], ignore_index=True)
        pd.testing.assert_frame_equal(_sorted(together), _sorted(runs.whole.tables[table]), check_exact=True)
