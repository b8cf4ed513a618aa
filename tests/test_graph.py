"""The whole asset graph materialized in-process on the bundled demo data.

These tests exercise the Dagster layer: every asset and check, the DuckDB store,
rebuilding one asset from stored upstream tables, and a broken input stopping
the cycle at the matching blocking check with the failing rows in its metadata.
"""

import re
import shutil
from pathlib import Path

import dagster as dg
import numpy as np
import pandas as pd
import pytest
import yaml

from pipelines.checks import CHECKS, CHOSEN_STRATEGY_BEATS_SEASONAL_NAIVE, NEW_CUSTOMERS_HAVE_SHARE
from pipelines.config import load_config
from pipelines.definitions import ASSETS, build_definitions
from pipelines.partitions import current_cycle
from pipelines.resources import read_table, stored_cycles
from pipelines.runner import CycleRun, rebuild_selection, run_partitions

pytestmark = pytest.mark.graph

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "data" / "demo"


def make_config(tmp: Path, inputs: Path = DEMO, **overrides) -> str:
    data = yaml.safe_load((ROOT / "config" / "planning.yaml").read_text())
    data["inputs"]["folder"] = str(inputs)
    data["store"]["path"] = str(tmp / "store")
    for key, value in overrides.items():
        data[key] = value
    path = tmp / "planning.yaml"
    path.write_text(yaml.safe_dump(data))
    return str(path)


def run_cycle(config_path: str, instance: dg.DagsterInstance | None = None, cycle: str | None = None) -> CycleRun:
    """Every class of the config's current cycle, one in-process run per partition."""
    config = load_config(config_path)
    return run_partitions(
        build_definitions(config_path),
        instance or dg.DagsterInstance.ephemeral(),
        current_cycle(config, cycle),
        list(config.product_classes),
    )


def checks_of(result: CycleRun) -> dict[str, dg.AssetCheckEvaluation]:
    """asset:check -> its evaluation; when the classes differ, a failing evaluation wins over a passing one."""
    found: dict[str, dg.AssetCheckEvaluation] = {}
    for e in result.get_asset_check_evaluations():
        key = f"{e.asset_key.to_user_string()}:{e.check_name}"
        if key not in found or (found[key].passed and not e.passed):
            found[key] = e
    return found


def metadata_of(result: CycleRun, asset: str) -> dict[str, dict]:
    """product class -> the metadata of `asset`'s materialization in that class's run."""
    return {
        c: next(
            e.materialization.metadata
            for e in r.get_asset_materialization_events()
            if e.asset_key.to_user_string() == asset
        )
        for c, r in result.results.items()
    }


def summed(metadata: dict[str, dict], key: str) -> int:
    return sum(m[key].value for m in metadata.values())


@pytest.fixture(scope="module")
def demo_cycle(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("demo_cycle")
    config = make_config(tmp)
    result = run_cycle(config)
    assert list(result.results) == ["consumables", "seasonal", "spares"] and result.cycle == "2026-11-30"
    return result, tmp / "store", config


def assert_only_the_new_customer_warning_fails(result: dg.ExecuteInProcessResult) -> dg.AssetCheckEvaluation:
    """Every blocking check passes; the one failing check is the WARN on new customers without share."""
    checks = checks_of(result)
    failed = [k for k, e in checks.items() if not e.passed]
    assert failed == [f"share_tables:{NEW_CUSTOMERS_HAVE_SHARE}"]
    warning = checks[failed[0]]
    assert warning.severity == dg.AssetCheckSeverity.WARN
    # the demo plants FITT-001 / SITE-SOUTH / C0051 without reference or initial share (data/demo/README.md)
    assert warning.metadata["failing_count"].value == 1
    assert "C0051" in warning.metadata["failing_rows_sample"].value
    return warning


def test_demo_cycle_succeeds_and_every_blocking_check_passes(demo_cycle):
    result, _, _ = demo_cycle
    assert result.success
    checks = checks_of(result)
    # by design the demo has one new customer without share: a WARN that does not stop the cycle
    assert_only_the_new_customer_warning_fails(result)
    assert all(e.passed for e in checks.values() if e.severity == dg.AssetCheckSeverity.ERROR)
    # every asset has its schema check, and every rule check ran on the asset it judges
    for key in dg.AssetSelection.all().resolve(ASSETS):
        name = key.to_user_string()
        assert f"{name}:{name}_matches_schema" in checks
    for check in CHECKS:
        assert f"{check.asset}:{check.name}" in checks


def test_auto_classes_follow_the_backtest_choice_and_stay_coherent(demo_cycle):
    result, store, config = demo_cycle
    accuracy = read_table(store, "backtest_accuracy")
    # every class is backtested (consumables is fixed to the split, the others `auto`); the `auto` ones with
    # all five strategies and the benchmark at both grains, consumables with its split and the benchmark alone
    assert set(accuracy["product_class"]) == {"consumables", "seasonal", "spares"}
    fixed = accuracy[accuracy["product_class"] == "consumables"]
    assert set(fixed["strategy"]) == {"top_down", "seasonal_naive"} and set(fixed["grain"]) == {"leaf", "parent"}
    assert set(accuracy[accuracy["product_class"] != "consumables"]["strategy"]) == {
        "top_down",
        "forecast_proportions",
        "bottom_up",
        "mint_shrink",
        "wls_var",
        "seasonal_naive",
    }
    # the interval levels of config/planning.yaml are scored too
    assert set(accuracy["metric"]) == {"wmape", "bias", "mase", "rmsse", "fva", "coverage_80", "coverage_95"}
    assert set(accuracy["grain"]) == {"leaf", "parent"}
    # consumables (seasonality auto) compares none with group; the others their models' own setting
    by_class = accuracy.groupby("product_class")["seasonality"].unique().apply(sorted).to_dict()
    assert by_class == {"consumables": ["group", "none"], "seasonal": ["own"], "spares": ["none"]}
    # the decision is stored once (strategy_choice) and the forecast followed it
    choice = read_table(store, "strategy_choice").set_index("product_class")
    parent = read_table(store, "parent_forecast")
    in_effect = parent.drop_duplicates("product_class").set_index("product_class")["strategy"]
    assert in_effect.sort_index().to_dict() == choice["strategy"].sort_index().to_dict()
    # an `auto` winner has the lowest leaf WMAPE of the five, so its margin over the runner-up is >= 0
    auto = choice[choice["configured_strategy"] == "auto"]
    assert set(auto.index) == {"seasonal", "spares"} and (auto["margin"] >= 0).all()
    assert choice.loc["consumables", "strategy"] == "top_down"
    # the choice and margins are in the metadata; the WARN check ran (and passes on the demo)
    warn = checks_of(result)["strategy_choice:chosen_strategy_beats_seasonal_naive"]
    assert "strategy_choice" in warn.metadata
    assert warn.severity == dg.AssetCheckSeverity.WARN and warn.passed
    models = read_table(store, "forecast_models")
    assert {"parent", "leaf"} >= set(models["grain"]) and (models["model"] != "").all()


def test_every_asset_lands_as_a_table_named_like_it(demo_cycle):
    from assets.publication import PUBLICATION
    from pipelines.store import open_store

    _, store, config = demo_cycle
    tables = [k.to_user_string() for k in dg.AssetSelection.all().resolve(ASSETS) if k.to_user_string() != PUBLICATION]
    for name in tables:
        table = read_table(store, name)
        assert isinstance(table, pd.DataFrame)
    assert len(read_table(store, "statistical_forecast")) > 0
    # the publication step records no table of its own: it publishes the others, every class of the cycle at once
    published = open_store(store).published("2026-11-30")
    assert sorted(published["classes"]) == ["consumables", "seasonal", "spares"]
    assert all(sorted(c["tables"]) == sorted(tables) for c in published["classes"].values())


def test_the_models_volume_reaches_the_leaves_or_is_set_to_zero_with_its_reason(demo_cycle):
    # The volume the model forecast for a top-down parent, recomputed outside the cycle, is what its customers
    # hold, period by period; only periods the lifecycle set to 0 (with their zero_reason) differ.
    # Reference: statsforecast's own models on each parent's series built here from the stored lifecycle
    # history (weekly sums from the first week with demand to the week before the cycle, zero-filled), the model
    # the cycle recorded for it in forecast_models (config/planning.yaml: auto_ets for smooth consumables,
    # croston_sba for intermittent spares). Tolerance 1e-7 relative: the same library on the same numbers.
    # A parent with group seasonality (consumables, if the backtest chose it): the model ran on its series
    # divided by statsmodels' multiplicative seasonal index (seasonal_decompose, period 52) of its product's
    # weekly sum over the class's history, and the forecast is multiplied by the index again.
    from statsforecast import StatsForecast
    from statsforecast.models import AutoETS, CrostonSBA
    from statsmodels.tsa.seasonal import seasonal_decompose

    _, store, _ = demo_cycle
    cycle = pd.Timestamp("2026-11-30")
    make = {"auto_ets(season_length=1)": lambda: AutoETS(season_length=1), "croston_sba": CrostonSBA}
    key = ["product", "site", "period_start"]
    checked = []
    for product_class in ("consumables", "spares"):
        history = read_table(store, "lifecycle_history", product_class=product_class)
        parent = read_table(store, "parent_forecast", product_class=product_class)
        leaf = read_table(store, "statistical_forecast", product_class=product_class)
        models = read_table(store, "forecast_models", product_class=product_class)
        top_down = parent.loc[parent["strategy"] == "top_down", ["product", "site"]].drop_duplicates()
        models = models[(models["grain"] == "parent") & models["model"].isin(list(make))].merge(top_down)
        weekly = history.groupby(["product", "site", "period_start"])["quantity"].sum()
        real = history[history["quantity"] != 0]
        all_weeks = pd.date_range(real["period_start"].min(), cycle - pd.Timedelta(days=7), freq="W-MON")
        by_product = history.groupby(["product", "period_start"])["quantity"].sum()
        grouped = set(models.loc[models.get("seasonality", pd.Series(dtype=str)) == "group", "product"])
        index = {}  # product -> (history index by week, horizon index)
        for product in grouped:
            agg = by_product.loc[product].reindex(all_weeks, fill_value=0.0).to_numpy()
            seasonal = seasonal_decompose(agg, model="multiplicative", period=52).seasonal
            index[product] = (pd.Series(seasonal, index=all_weeks), seasonal[len(agg) - 52 : len(agg) - 26])
        for label, factory in make.items():
            frames = []
            for product, site in models.loc[models["model"] == label, ["product", "site"]].itertuples(index=False):
                y = weekly.loc[(product, site)]
                y = y[y.index < cycle]
                y = y.loc[y[y != 0].index.min():]
                weeks = pd.date_range(y.index.min(), cycle - pd.Timedelta(days=7), freq="W-MON")
                values = y.reindex(weeks, fill_value=0.0).to_numpy()
                if product in index:
                    values = values / index[product][0].reindex(weeks).to_numpy()
                frames.append(pd.DataFrame({"unique_id": f"{product}|{site}", "ds": weeks, "y": values}))
            if not frames:
                continue
            fc = StatsForecast(models=[factory()], freq="W-MON").forecast(df=pd.concat(frames), h=26)
            fc = fc.set_axis(["unique_id", "period_start", "model_forecast"], axis=1)
            fc[["product", "site"]] = fc["unique_id"].str.split("|", expand=True)
            for product in set(fc["product"]) & set(index):
                rows = fc["product"] == product
                fc.loc[rows, "model_forecast"] *= np.tile(index[product][1], int(rows.sum()) // 26)
            fc["model_forecast"] = fc["model_forecast"].clip(lower=0)  # the cycle sets a negative forecast to 0
            sums = leaf.groupby(key)["forecast"].sum().rename("leaf_sum").reset_index()
            got = fc.merge(parent[key + ["forecast", "strategy_forecast", "zero_reason"]], on=key, validate="1:1")
            checked.append(got.merge(sums, on=key, validate="1:1").assign(product_class=product_class))
    got = pd.concat(checked, ignore_index=True)
    assert set(got["product_class"]) == {"consumables", "spares"} and got["unique_id"].nunique() >= 40
    assert (got.groupby("unique_id").size() == 26).all()
    # the stored strategy value is the model's forecast, recomputed here
    np.testing.assert_allclose(got["strategy_forecast"], got["model_forecast"], rtol=1e-7, atol=1e-9)
    planned = got[got["zero_reason"].isna()]
    zeroed = got[got["zero_reason"].notna()]
    # where the lifecycle left it alone, the customers hold the model's volume, and so does the final forecast
    np.testing.assert_allclose(planned["leaf_sum"], planned["model_forecast"], rtol=1e-7, atol=1e-9)
    np.testing.assert_allclose(planned["forecast"], planned["model_forecast"], rtol=1e-7, atol=1e-9)
    # where it set a period to 0 it says why, and nobody holds the model's volume there (the demo's FILT-003
    # ends inside the horizon; data/demo/README.md)
    assert len(zeroed) > 0 and set(zeroed["zero_reason"]) == {"product_not_active"}
    assert (zeroed["leaf_sum"] == 0).all() and (zeroed["forecast"] == 0).all()
    assert (zeroed["model_forecast"] > 0).all()


def test_the_reconciliation_counts_the_periods_the_lifecycle_set_to_zero(demo_cycle):
    result, store, _ = demo_cycle
    rc = read_table(store, "reconciliation", product_class="consumables")
    zeroed = rc[rc["zero_reason"].notna()]
    # left out of the comparison with the strategy's value: their expected leaf sum is 0, not the model's
    assert len(zeroed) == 26 and (zeroed["expected"] == 0).all() and (zeroed["strategy_forecast"] > 0).all()
    check = checks_of(result)["reconciliation:children_sum_to_parent"]
    assert check.passed
    assert "1404 parent periods with the strategy's parent forecast; 26 set to 0" in check.metadata["compared"].value
    meta = metadata_of(result, "reconciliation")["consumables"]
    assert meta["parent_periods_set_to_zero_by_lifecycle"].value == 26
    assert meta["parent_periods_compared_with_strategy_forecast"].value == 1404


def test_every_raw_line_is_used_or_rejected(demo_cycle):
    _, store, _ = demo_cycle
    for product_class in ("consumables", "seasonal", "spares"):
        raw = read_table(store, "raw_history", product_class=product_class)
        cleaned = read_table(store, "cleaned_history", product_class=product_class)
        rejected = read_table(store, "rejected_rows", product_class=product_class)
        assert len(raw) == int(cleaned["lines"].sum()) + len(rejected) > 0
    # the five bad lines planted in the demo, one per reason (data/demo/README.md); a line of a product in
    # no class (unknown or blank) is kept and rejected in every class, the others in their own class only
    rejected = read_table(store, "rejected_rows", with_partition=True)
    lines = rejected.drop_duplicates(["source_file", "source_row"])
    assert sorted(lines["reason"]) == sorted(
        ["missing_key", "bad_date", "bad_quantity", "unknown_product", "no_customer_span"]
    )
    in_every_class = rejected.groupby(["source_file", "source_row"])["partition_class"].nunique()
    products = set(read_table(store, "products")["product"])
    no_class = lines.set_index(["source_file", "source_row"])["product"].map(lambda p: p not in products)
    assert (in_every_class[no_class] == 3).all() and (in_every_class[~no_class] == 1).all()
    total = len(pd.read_csv(DEMO / "history.csv"))
    assert len(read_table(store, "raw_history")) == total + 2 * int(no_class.sum())


def test_demo_lifecycle_cases_reach_the_share_table(demo_cycle):
    _, store, _ = demo_cycle
    shares = read_table(store, "share_tables")
    audit = read_table(store, "lifecycle_audit")
    history = read_table(store, "lifecycle_history")
    leaf = read_table(store, "statistical_forecast")
    # phased-out customer FITT-001/SITE-SOUTH/C0007 gets no share and no forecast
    out = (shares["product"] == "FITT-001") & (shares["site"] == "SITE-SOUTH") & (shares["customer"] == "C0007")
    assert not out.any()
    assert ((leaf["product"] == "FITT-001") & (leaf["customer"] == "C0007") & (leaf["site"] == "SITE-SOUTH")).sum() == 0
    assert {"outside_active_span", "phased_out_before_cycle"} <= set(audit["rule"])
    # retired TIMR-003 has no share; its history now sits on successor TIMR-004
    assert not (shares["product"] == "TIMR-003").any()
    mapped = history[(history["origin"] == "successor")]
    assert set(mapped["source_product"]) == {"TIMR-003"} and set(mapped["product"]) == {"TIMR-004"}
    # new customer C0049 on DRIP-002/SITE-NORTH takes half of reference C0001's share (scale 0.5, the
    # config default); no history is copied
    assert set(history["origin"]) == {"own", "successor"}
    parent = shares[(shares["product"] == "DRIP-002") & (shares["site"] == "SITE-NORTH")].set_index("customer")
    assert parent.loc["C0049", "lifecycle_rule"] == "reference" and parent.loc["C0049", "reference_customer"] == "C0001"
    assert parent.loc["C0001", "history_share"] > 0
    assert parent.loc["C0049", "share"] == pytest.approx(0.5 * parent.loc["C0001", "history_share"], abs=1e-12)
    assert parent.loc["C0001", "share"] == pytest.approx(0.5 * parent.loc["C0001", "history_share"], abs=1e-12)
    assert parent["share"].sum() == pytest.approx(1.0, abs=1e-12)


def _leaf(frame, product, site, customer):
    rows = frame[(frame["product"] == product) & (frame["site"] == site) & (frame["customer"] == customer)]
    return rows.sort_values("period_start").set_index("period_start")


def _parent(frame, product, site):
    return frame[(frame["product"] == product) & (frame["site"] == site)]


def test_demo_lifecycle_inside_the_horizon(demo_cycle):
    _, store, _ = demo_cycle
    shares = read_table(store, "share_tables")
    target = read_table(store, "reinitialized_target")
    leaf = read_table(store, "statistical_forecast")
    parent_fc = read_table(store, "parent_forecast")
    rule = {tuple(k): r for *k, r in shares[["product", "site", "customer", "lifecycle_rule"]].itertuples(index=False)}
    last_week, after = pd.Timestamp("2027-02-08"), pd.Timestamp("2027-02-15")

    # FERT-001 / SITE-SOUTH / C0003 ends Sunday 2027-02-14: share up to the week of 02-08, 0 after,
    # the others renormalised so the parent's shares still sum to 1
    assert rule[("FERT-001", "SITE-SOUTH", "C0003")] == "phase_out"
    c3 = _leaf(target, "FERT-001", "SITE-SOUTH", "C0003")
    assert (c3.loc[:last_week, "share"] > 0).all() and (c3.loc[after:, "share"] == 0).all()
    assert (_leaf(leaf, "FERT-001", "SITE-SOUTH", "C0003").loc[after:, "forecast"] == 0).all()
    fert = _parent(target, "FERT-001", "SITE-SOUTH").groupby("period_start")["share"].sum()
    np.testing.assert_allclose(fert.to_numpy(), 1.0, atol=1e-12)
    other = _parent(target, "FERT-001", "SITE-SOUTH")
    other = other[other["customer"] != "C0003"].pivot(index="period_start", columns="customer", values="share")
    # each remaining customer is scaled by the same 1 / (1 - share of C0003)
    ratio = other.loc[after] / other.loc[last_week]
    np.testing.assert_allclose(ratio.to_numpy(), 1.0 / (1.0 - c3.loc[last_week, "share"]), rtol=1e-12)

    # DRIP-001 / SITE-NORTH / C0050 starts Monday 2027-01-25 with initial_share 0.15; the others x 0.85
    assert rule[("DRIP-001", "SITE-NORTH", "C0050")] == "initial_share"
    c50 = _leaf(target, "DRIP-001", "SITE-NORTH", "C0050")
    start = pd.Timestamp("2027-01-25")
    assert (c50.loc[: start - pd.Timedelta(days=7), "share"] == 0).all()
    np.testing.assert_allclose(c50.loc[start:, "share"].to_numpy(), 0.15, atol=1e-12)
    drip = _parent(target, "DRIP-001", "SITE-NORTH")
    drip = drip[drip["customer"] != "C0050"].pivot(index="period_start", columns="customer", values="share")
    np.testing.assert_allclose((drip.loc[start] / drip.loc[start - pd.Timedelta(days=7)]).to_numpy(), 0.85, rtol=1e-12)
    assert (_leaf(leaf, "DRIP-001", "SITE-NORTH", "C0050").loc[start:, "forecast"] > 0).all()

    # FITT-001 / SITE-SOUTH / C0051 is new without reference or initial share: no share, no forecast,
    # and the parent's forecast goes to the others
    assert rule[("FITT-001", "SITE-SOUTH", "C0051")] == "awaiting_history"
    assert (_leaf(target, "FITT-001", "SITE-SOUTH", "C0051")["share"] == 0).all()
    assert (_leaf(leaf, "FITT-001", "SITE-SOUTH", "C0051")["forecast"] == 0).all()
    fitt = _parent(leaf, "FITT-001", "SITE-SOUTH").groupby("period_start")["forecast"].sum()
    np.testing.assert_allclose(
        fitt.to_numpy(),
        _parent(parent_fc, "FITT-001", "SITE-SOUTH").sort_values("period_start")["forecast"].to_numpy(),
        rtol=1e-12,
    )

    # FILT-003 ends Sunday 2027-02-28: forecast until the week of 02-22, then 0 with its reason
    filt = parent_fc[parent_fc["product"] == "FILT-003"].set_index("period_start").sort_index()
    end = pd.Timestamp("2027-02-22")
    assert (filt.loc[:end, "forecast"] > 0).all() and filt.loc[:end, "zero_reason"].isna().all()
    assert (filt.loc[end + pd.Timedelta(days=7):, "forecast"] == 0).all()
    assert set(filt.loc[end + pd.Timedelta(days=7):, "zero_reason"]) == {"product_not_active"}
    assert (leaf.loc[(leaf["product"] == "FILT-003") & (leaf["period_start"] > end), "forecast"] == 0).all()
    assert set(shares.loc[shares["product"] == "FILT-003", "last_active_period"]) == {end}


def test_planner_metadata_on_share_tables_and_reinitialized_target(demo_cycle):
    result, _, _ = demo_cycle
    # the demo's lifecycle cases are all in consumables (data/demo/README.md)
    shares = metadata_of(result, "share_tables")["consumables"]
    # counts per lifecycle rule: the three new customers of the demo, one each, and the phase-outs
    rows = [line.strip("|").split("|") for line in shares["children_by_lifecycle_rule"].value.splitlines()[2:]]
    by_rule = {name.strip(): int(count) for name, count in rows}
    assert by_rule["reference"] == by_rule["initial_share"] == by_rule["awaiting_history"] == 1
    # C0003 plus the 18 customers (seed) of FILT-003, which ends inside the horizon
    assert by_rule["phase_out"] == 19 and by_rule["phase_in"] == 0
    assert sum(by_rule.values()) == shares["children"].value
    assert shares["new_customer_count"].value == 3
    listed = shares["new_customers"].value
    assert (
        all(c in listed for c in ("C0049", "C0050", "C0051"))
        and "taken from it" in listed
        and "initial share 0.15" in listed
    )
    mix = metadata_of(result, "reinitialized_target")["consumables"]
    # C0050 phases in (DRIP-001/SITE-NORTH), C0003 out (FERT-001/SITE-SOUTH), FILT-003 ends at both its sites
    assert mix["parents_with_mix_change_count"].value == 4
    text = mix["parents_with_mix_change"].value
    assert "C0050" in text and "C0003" in text and text.count("FILT-003") == 2
    assert "product_not_active" in mix["zero_periods_by_reason"].value


def test_rebuilding_one_class_replaces_exactly_its_partition(demo_cycle):
    _, store, config = demo_cycle
    before = read_table(store, "share_tables", with_partition=True)
    written = read_table(store, "partitions_written", with_partition=True).set_index(
        ["asset", "partition_cycle", "partition_class"]
    )["written_at"]
    defs = build_definitions(config)
    selection = rebuild_selection(defs, "share_tables")
    names = {k.to_user_string() for k in selection}
    # share_tables and everything downstream (multi-asset outputs come together), nothing upstream: the
    # backtest, whose share_tuning the share tables of `auto` classes follow, is upstream and not run again
    assert {
        "share_tables",
        "reinitialized_target",
        "parent_forecast",
        "statistical_forecast",
        "reconciliation",
    } <= names
    assert not names & {
        "raw_history", "cleaned_history", "lifecycle_history", "products", "backtest_accuracy", "share_tuning"
    }
    result = run_partitions(
        defs,
        dg.DagsterInstance.ephemeral(),
        "2026-11-30",
        ["spares"],
        all_classes=["consumables", "seasonal", "spares"],
        selection=selection,
    )
    assert result.success and result.blocking_checks_pass
    materialized = {e.asset_key.to_user_string() for e in result.get_asset_materialization_events()}
    assert materialized == names
    after = read_table(store, "share_tables", with_partition=True)
    # idempotent: the same rows, none duplicated, in the same order
    pd.testing.assert_frame_equal(before, after)
    now = read_table(store, "partitions_written", with_partition=True).set_index(
        ["asset", "partition_cycle", "partition_class"]
    )["written_at"]
    moved = now[now != written.reindex(now.index)].index
    # only the spares partitions of the rebuilt assets were written again; the other classes are untouched
    # (the publication step writes no table: it records the class complete and publishes the cycle again)
    assert {(a, c, k) for a, c, k in moved} == {(a, "2026-11-30", "spares") for a in names if a != "publication"}


def test_parallel_runs_publish_the_cycle_once_when_the_last_class_completes(demo_cycle, tmp_path, monkeypatch, capsys):
    """`rebuild --parallel 2`: one process per class, two at once; classes finishing together publish once."""
    from pipelines.__main__ import main
    from pipelines.store import open_store

    _, demo_store, _ = demo_cycle
    store = tmp_path / "store"
    shutil.copytree(demo_store, store)
    before = {name: read_table(store, name, with_partition=True) for name in ("share_tables", "statistical_forecast")}
    sequence = open_store(store).published("2026-11-30")["sequence"]
    monkeypatch.setenv("DAGSTER_HOME", str(tmp_path / "home"))
    config = make_config(tmp_path)
    args = ["rebuild", "--config", config, "--from", "publication", "--parallel", "2"]
    assert main(args + [a for c in ("consumables", "seasonal", "spares") for a in ("--class", c)]) == 0
    out = capsys.readouterr().out
    assert out.count("succeeded") == 3 and "INCOMPLETE" not in out
    # the progress display followed each child process's run through the instance: its one stage, ended
    for name in ("consumables", "seasonal", "spares"):
        assert re.search(rf"^  {name} +1/1 publication +[\d,]+ rows +\d+\.\d s$", out, re.MULTILINE), out
    # the three classes were pending together, so the cycle was published once more, not once per class
    assert open_store(store).published("2026-11-30")["sequence"] == sequence + 1
    for name, frame in before.items():
        pd.testing.assert_frame_equal(read_table(store, name, with_partition=True), frame)


def test_broken_input_fails_its_blocking_check_with_the_rows(tmp_path):
    inputs = tmp_path / "inputs"
    shutil.copytree(DEMO, inputs)
    spans = pd.read_csv(inputs / "customer_spans.csv", dtype=str, keep_default_na=False)
    # break one span on purpose: it ends before it starts
    spans.loc[3, "active_from"] = "2025-06-01"
    spans.loc[3, "active_to"] = "2025-01-01"
    spans.to_csv(inputs / "customer_spans.csv", index=False)
    result = run_cycle(make_config(tmp_path, inputs=inputs))

    check = checks_of(result)["customer_spans:customer_spans_matches_schema"]
    assert not check.passed
    assert check.severity == dg.AssetCheckSeverity.ERROR
    assert check.metadata["failing_row_count"].value == 1
    sample = check.metadata["failing_rows_sample"].value
    assert spans.loc[3, "customer"] in sample and "2025-01-01" in sample
    assert "span_ordered" in check.metadata["failures_by_check"].value
    # blocking: in the broken span's class (DRIP-001 is consumables) nothing downstream of the spans was
    # materialized; the other classes' partitions do not hold that span and ran through
    broken = result.results["consumables"]
    materialized = {e.asset_key.to_user_string() for e in broken.get_asset_materialization_events()}
    assert "customer_spans" in materialized
    assert not materialized & {"cleaned_history", "share_tables", "statistical_forecast", "reconciliation"}
    assert result.results["spares"].success and result.results["seasonal"].success


def test_unknown_product_class_stops_the_cycle_with_a_named_error(tmp_path):
    inputs = tmp_path / "inputs"
    shutil.copytree(DEMO, inputs)
    products = pd.read_csv(inputs / "products.csv", dtype=str, keep_default_na=False)
    products.loc[0, "product_class"] = "bulky"
    products.to_csv(inputs / "products.csv", index=False)
    result = run_cycle(make_config(tmp_path, inputs=inputs))
    assert not result.success
    failure = next(e for e in result.all_events if e.is_step_failure)
    message = failure.event_specific_data.error.cause.message
    assert "'bulky'" in message and "product_classes" in message and "consumables" in message


def test_monthly_calendar_runs_the_same_graph(tmp_path):
    classes = yaml.safe_load((ROOT / "config" / "planning.yaml").read_text())["product_classes"]
    for name, window in (("consumables", 6), ("seasonal", 12), ("spares", 24)):
        classes[name]["window"] = window
        classes[name]["fallback_windows"] = [30]
    config = make_config(
        tmp_path,
        calendar={"period": "month", "cycle_date": "2026-11-01", "horizon": 6},
        product_classes=classes,
        cleansing={"outliers": {"rule": "hampel", "window": 7, "k": 5.0}},
        lifecycle={"min_history_periods": 3, "reference_scale": 0.5},  # 3 months, about the weekly 13 weeks
        share_bases={"promotions_52w": {"window": 12, "fallback_windows": [24]}},  # a year of months
    )
    result = run_cycle(config)
    assert result.success
    # every ERROR check passes; the WARN checks that may fail: C0051 starts in November, the cycle
    # month, with no history and so no share yet; the backtest may lose to seasonal naive on 35 months
    checks = checks_of(result)
    failed = {k for k, e in checks.items() if not e.passed}
    assert f"share_tables:{NEW_CUSTOMERS_HAVE_SHARE}" in failed
    assert failed <= {
        f"share_tables:{NEW_CUSTOMERS_HAVE_SHARE}",
        f"strategy_choice:{CHOSEN_STRATEGY_BEATS_SEASONAL_NAIVE}",
    }
    assert all(checks[k].severity == dg.AssetCheckSeverity.WARN for k in failed)
    assert f"strategy_choice:{CHOSEN_STRATEGY_BEATS_SEASONAL_NAIVE}" in checks
    store = tmp_path / "store"
    cleaned = read_table(store, "cleaned_history")
    assert (cleaned["period_start"].dt.day == 1).all()
    forecast = read_table(store, "parent_forecast")
    assert sorted(forecast["period_start"].dt.strftime("%Y-%m").unique()) == [
        "2026-11",
        "2026-12",
        "2027-01",
        "2027-02",
        "2027-03",
        "2027-04",
    ]
    # an explicit cycle date of 2026-11-01 leaves November's lines out of the history, as rejected rows
    rejected = read_table(store, "rejected_rows")
    late = rejected[rejected["reason"] == "on_or_after_cycle_date"]
    assert len(late) > 1000 and (pd.to_datetime(late["period_start"]) >= "2026-11-01").all()
    assert cleaned["period_start"].max() == pd.Timestamp("2026-10-01")


def test_demo_plan_measures_each_split_by_its_rule_with_the_pins_kept(demo_cycle):
    from pipelines.checks import MEASURES_SUM_TO_PARENT, PINS_KEPT, PINS_WITHIN_PARENT

    result, store, _ = demo_cycle
    plan = read_table(store, "plan_measures")
    checks = checks_of(result)
    for name in (MEASURES_SUM_TO_PARENT, PINS_KEPT, PINS_WITHIN_PARENT):
        assert checks[f"plan_measures:{name}"].passed
    assert set(plan["measure"]) == {"statistical_forecast", "list_price", "promotion_uplift", "planner_adjustment"}
    key = ["product", "site", "customer", "period_start"]
    # the pins of data/demo/pins.csv (case 15) are the values of their leaves
    pins = pd.read_csv(DEMO / "pins.csv", parse_dates=["period_start"])
    kept = pins.merge(plan[plan["pinned"]], on=key + ["measure"], suffixes=("_pin", ""))
    assert len(kept) == len(pins) == int(plan["pinned"].sum())
    np.testing.assert_allclose(kept["value"], kept["value_pin"], rtol=0, atol=0)
    # statistical_forecast: the forecast stage's own leaf values, except in the parent periods a pin changed
    fc = read_table(store, "statistical_forecast").merge(
        plan[plan["measure"] == "statistical_forecast"], on=key, how="left"
    )
    pinned = pins[pins["measure"] == "statistical_forecast"][["product", "site", "period_start"]].assign(p=True)
    fc = fc.merge(pinned, on=["product", "site", "period_start"], how="left")
    same = fc[fc["p"].isna() & fc["value"].notna()]
    np.testing.assert_allclose(same["value"], same["forecast"], rtol=1e-12, atol=1e-12)
    assert (fc.loc[fc["value"].isna(), "forecast"] == 0).all()  # no plan row: not active, forecast 0
    # list_price replicates the parent's price; C0001 of DRIP-002 / SITE-NORTH keeps its contract price
    price = plan[(plan["measure"] == "list_price") & ~plan["pinned"]]
    assert (price["value"] == price["parent_value"]).all() and set(price["basis"]) == {"parent"}
    # planner_adjustment 2026-12-07 on DRIP-001 / SITE-NORTH: 200 = the pin (105) + the rest in packs of 5
    adj = plan[
        (plan["measure"] == "planner_adjustment")
        & (plan["product"] == "DRIP-001")
        & (plan["period_start"] == "2026-12-07")
    ]
    assert adj["value"].sum() == 200 and (adj["value"] % 5 == 0).all()
    # promotion_uplift in whole units by the 52-week share table, summing to each entered value
    promo = plan[plan["measure"] == "promotion_uplift"]
    assert set(promo.loc[~promo["pinned"], "basis"]) == {"share_table:promotions_52w"}
    assert (promo["value"] == np.rint(promo["value"])).all()
    entered = pd.read_csv(DEMO / "adjustments.csv", parse_dates=["period_start"])
    entered = entered[entered["measure"] == "promotion_uplift"].set_index(["product", "site", "period_start"])["value"]
    got = promo.groupby(["product", "site", "period_start"])["value"].sum()
    pd.testing.assert_series_equal(got.sort_index(), entered.sort_index().astype(float), check_names=False)


def test_demo_exercises_every_cleansing_rule(demo_cycle):
    from pipelines.demo_data import planted_cases

    result, store, _ = demo_cycle
    corrections = read_table(store, "history_corrections")
    products = read_table(store, "products").set_index("product")["product_class"]
    corrections["product_class"] = corrections["product"].map(products)
    by_class = corrections.groupby("product_class")["rule"].unique().map(set).to_dict()
    # config/planning.yaml: Hampel by default (consumables), Tukey with seasonal adjustment on the
    # seasonal class, no outlier rule on spares; returns on consumables (data/demo/README.md, case 5)
    assert by_class["consumables"] == {"hampel_cap", "negative_net_to_zero"}
    assert by_class["seasonal"] == {"tukey_cap"}
    assert "spares" not in by_class
    # every planted consumables spike (case 4) is corrected
    planted = planted_cases()
    spikes = planted[planted["case"] == "outlier"].assign(period_start=lambda f: pd.to_datetime(f["period_start"]))
    caught = spikes.merge(corrections, on=["product", "site", "customer", "period_start"])
    assert len(caught) == len(spikes) == 8 and set(caught["rule"]) == {"hampel_cap"}
    # the three recorded shortages (case 9) flag every child of their product x site that week
    shortages = read_table(store, "shortages")
    cleaned = read_table(store, "cleaned_history")
    assert len(shortages) == 3
    flagged = cleaned[cleaned["shortage"]]
    weeks = planted[planted["case"] == "shortage"]
    assert set(
        zip(flagged["product"], flagged["site"], flagged["period_start"].dt.strftime("%Y-%m-%d"), strict=False)
    ) == set(zip(weeks["product"], weeks["site"], weeks["period_start"], strict=False))
    for (product, site, week), g in flagged.groupby(["product", "site", "period_start"]):
        children = cleaned[
            (cleaned["product"] == product) & (cleaned["site"] == site) & (cleaned["period_start"] == week)
        ]
        assert len(g) == len(children) > 0
    # exclude (the bundled rule): the shortage weeks keep their values, no correction touches them
    assert not flagged["corrected"].any()
    # the asset's metadata carries the counts a planner looks at
    meta = metadata_of(result, "cleaned_history")
    assert summed(meta, "shortage_periods") == len(flagged) == 20
    assert "tukey_cap" in meta["seasonal"]["corrections_by_class_and_rule"].value


def test_demo_shortages_filled_with_each_childs_baseline():
    from pipelines.config import parse_config
    from pipelines.engines.history_files import load_raw_history
    from pipelines.schemas import CustomerSpans, Products, Shortages
    from pipelines.stages.cleaned_history import clean_history, find_unexplained_changes
    from pipelines.stages.master_data import load_customer_spans, load_products, load_shortages

    data = yaml.safe_load((ROOT / "config" / "planning.yaml").read_text())
    data["cleansing"]["shortages"] = "fill_baseline"
    config = parse_config(data)
    raw, _ = load_raw_history(DEMO)
    products = Products.validate(load_products(DEMO)[0])
    spans = CustomerSpans.validate(load_customer_spans(DEMO)[0])
    shortages = Shortages.validate(load_shortages(DEMO)[0])
    res = clean_history(raw, products, spans, config, shortages=shortages)
    fills = res.corrections[res.corrections["rule"] == "shortage_fill"]
    # one fill per flagged child week (20, data/demo/README.md case 9), each raising the cut value
    assert len(fills) == int(res.cleaned["shortage"].sum()) == 20
    assert (fills["delta"] > 0).all()
    assert find_unexplained_changes(res.cleaned, res.corrections).empty
    # the sprinklers' shortage sits at their seasonal peak: filled on x - s with s added back
    sprk = fills[fills["product"] == "SPRK-001"]
    assert sprk["parameters"].str.contains('"seasonal_adjusted": true').all()


def test_cleansing_picture_is_written_to_the_cycle_report_folder(demo_cycle):
    result, store, _ = demo_cycle
    for product_class, meta in metadata_of(result, "cleaned_history").items():
        path = Path(meta["corrections_picture"].value)
        assert path == store.parent / "reports" / "2026-11-30" / f"cleansing_{product_class}.png"
        assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_two_cycles_side_by_side_and_the_share_drift_between_them(demo_cycle):
    from pipelines.checks import SHARE_DRIFT_WITHIN_LIMIT

    _, store, config = demo_cycle
    defs = build_definitions(config)
    instance = dg.DagsterInstance.ephemeral()
    current_before = read_table(store, "share_tables", cycle="2026-11-30", product_class="spares")
    # the previous week's cycle of one class: its history ends a week earlier (that week's lines are
    # rejected as on_or_after_cycle_date), and it lands beside the current cycle, which stays as it was
    previous = run_partitions(
        defs, instance, "2026-11-23", ["spares"], all_classes=["consumables", "seasonal", "spares"]
    )
    assert previous.success and previous.blocking_checks_pass
    # one class of three is complete: the cycle is not published, so readers do not see it yet
    assert stored_cycles(store) == ["2026-11-30"] and read_table(store, "share_tables", cycle="2026-11-23").empty
    late = read_table(store, "rejected_rows", cycle="2026-11-23", product_class="spares", versions="complete")
    assert (late["reason"] == "on_or_after_cycle_date").sum() > 0
    assert read_table(store, "cycle_calendar", cycle="2026-11-23", versions="complete")["cycle_date"].tolist() == [
        pd.Timestamp("2026-11-23")
    ]
    pd.testing.assert_frame_equal(
        read_table(store, "share_tables", cycle="2026-11-30", product_class="spares"), current_before
    )
    # now the current cycle's drift compares with the class as it completed in that cycle
    rerun = run_partitions(defs, instance, "2026-11-30", ["spares"], selection=[dg.AssetKey("share_drift")])
    assert rerun.success
    # without the publication step in the run the new drift is a working version: the pipeline sees it, readers not yet
    drift = read_table(store, "share_drift", cycle="2026-11-30", product_class="spares", versions="latest")
    assert read_table(store, "share_drift", cycle="2026-11-30", product_class="spares").empty
    prev = read_table(store, "share_tables", cycle="2026-11-23", product_class="spares", versions="complete")
    assert set(drift["previous_cycle"]) == {"2026-11-23"}
    # every child of either cycle, its move = 100 x (share now - share then), worked from the two stored tables
    keys = ["product", "site", "customer"]
    both = (
        current_before[keys + ["share"]]
        .merge(prev[keys + ["share"]], on=keys, how="outer", suffixes=("_now", "_then"))
        .fillna(0.0)
    )
    expected = both.assign(change_pp=100 * (both["share_now"] - both["share_then"])).set_index(keys)["change_pp"]
    got = drift.set_index(keys)["change_pp"]
    pd.testing.assert_series_equal(got.sort_index(), expected.sort_index(), check_names=False, atol=1e-12)
    assert drift["abs_change_pp"].is_monotonic_decreasing
    check = checks_of(rerun)[f"share_drift:{SHARE_DRIFT_WITHIN_LIMIT}"]
    limit = load_config(config).monitoring.max_share_drift_pp
    assert check.severity == dg.AssetCheckSeverity.WARN
    assert check.passed == bool((drift["abs_change_pp"] <= limit).all())
    # the first cycle of a class has nothing to compare with
    first = read_table(store, "share_drift", cycle="2026-11-23", product_class="spares", versions="complete")
    assert first.empty


def test_watcher_warnings_fire_above_their_thresholds_and_list_the_rows(tmp_path):
    from pipelines.checks import FALLBACK_SHARE_WITHIN_LIMIT, REJECTED_ROWS_WITHIN_LIMIT

    classes = yaml.safe_load((ROOT / "config" / "planning.yaml").read_text())["product_classes"]
    # spares are intermittent: over a 4-week window many parents have no volume and fall back to 156 weeks
    classes["spares"].update(window=4, fallback_windows=[156])
    config = make_config(
        tmp_path, product_classes=classes, monitoring={"max_fallback_share": 0.10, "max_rejected_share": 0.0001}
    )
    defs = build_definitions(config)
    upstream = dg.AssetSelection.assets("share_tables").upstream().required_multi_asset_neighbors()
    run = run_partitions(
        defs,
        dg.DagsterInstance.ephemeral(),
        "2026-11-30",
        ["spares"],
        selection=list(upstream.resolve(defs.resolve_asset_graph())),
    )
    assert run.success and run.blocking_checks_pass  # WARN checks do not stop the cycle
    checks = checks_of(run)
    store = tmp_path / "store"
    # the run stopped at share_tables (no publication step): its tables are working versions
    shares = read_table(store, "share_tables", versions="latest").drop_duplicates(["product", "site"])
    with_fallback = shares[shares["fallback"] != "none"]
    assert len(with_fallback) / len(shares) > 0.10
    fallback = checks[f"share_tables:{FALLBACK_SHARE_WITHIN_LIMIT}"]
    assert not fallback.passed and fallback.severity == dg.AssetCheckSeverity.WARN
    assert fallback.metadata["failing_count"].value == len(with_fallback)
    assert with_fallback["product"].iloc[0] in fallback.metadata["failing_rows_sample"].value
    assert f"{len(with_fallback)} of {len(shares)}" in fallback.metadata["parents_with_fallback"].value
    # spares: the two lines of products in no class, of 1,029 lines (0.19 % > 0.01 %)
    rejected = checks[f"rejected_rows:{REJECTED_ROWS_WITHIN_LIMIT}"]
    assert not rejected.passed and rejected.severity == dg.AssetCheckSeverity.WARN
    assert rejected.metadata["failing_count"].value == 2
    assert "unknown_product" in rejected.metadata["by_reason"].value


def test_cycle_report_has_the_charts_and_a_page_with_every_class(demo_cycle):
    from pipelines.cycle_report import REPORT_FILE

    result, store, _ = demo_cycle
    folder = store.parent / "reports" / "2026-11-30"
    for product_class, meta in metadata_of(result, "cycle_report").items():
        for kind in ("parents", "shares"):
            path = Path(meta[f"{kind}_chart_file"].value)
            assert path.parent == folder and path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
            assert meta[f"{kind}_chart"].value.startswith(f"![{kind} of {product_class}")
    page = (folder / REPORT_FILE).read_text()
    for product_class in ("consumables", "seasonal", "spares"):
        assert f"parents_{product_class}_2026-11-30.png" in page
    # the one failing check of the demo (a WARN, by design) is listed before every passing check
    failed_at = page.index(NEW_CUSTOMERS_HAVE_SHARE)
    assert failed_at < page.index("children_sum_to_parent")


def test_explain_prints_how_a_leaf_was_made_from_the_store(demo_cycle, capsys):
    from pipelines.__main__ import main

    _, store, config = demo_cycle
    assert main(["explain", "--config", config, "DRIP-002", "SITE-NORTH", "C0049", "--period", "2026-12-07"]) == 0
    text = capsys.readouterr().out
    target = read_table(
        store, "statistical_forecast", where={"product": "DRIP-002", "site": "SITE-NORTH", "customer": "C0049"}
    )
    value = float(target.loc[target["period_start"] == pd.Timestamp("2026-12-07"), "forecast"].iloc[0])
    assert "reference" in text and "C0001" in text and f"{value:,.2f}" in text
    assert main(["explain", "--config", config, "DRIP-002", "SITE-NORTH", "C9999"]) == 2
    assert "C0049" in capsys.readouterr().err  # the customers of that parent are listed


def test_a_failed_rerun_leaves_the_published_cycle_as_readers_saw_it(demo_cycle, tmp_path, capsys):
    """A cycle publishes whole: a rerun in which one class fails publishes nothing, not even the classes that passed."""
    import duckdb

    from pipelines.__main__ import print_summary
    from pipelines.store import open_store

    _, demo_store, _ = demo_cycle
    store = tmp_path / "store"
    shutil.copytree(demo_store, store)  # the store is a relocatable folder: pointers name files relative to it
    published = open_store(store).published_cycles()
    tables = sorted(open_store(store).published("2026-11-30")["classes"]["spares"]["tables"])
    before = {name: read_table(store, name, with_partition=True) for name in tables}
    # new history lines on a spares parent (so a good rerun of spares would change its tables), and a broken
    # customer span of a consumables product: that class stops at its blocking schema check
    inputs = tmp_path / "inputs"
    shutil.copytree(DEMO, inputs)
    spans = pd.read_csv(inputs / "customer_spans.csv", dtype=str, keep_default_na=False)
    products = pd.read_csv(inputs / "products.csv", dtype=str, keep_default_na=False)
    products = products.set_index("product")["product_class"]
    broken = spans.index[spans["product"].map(products) == "consumables"][0]
    spans.loc[broken, ["active_from", "active_to"]] = ["2025-06-01", "2025-01-01"]
    spans.to_csv(inputs / "customer_spans.csv", index=False)
    history = pd.read_csv(inputs / "history.csv", dtype=str, keep_default_na=False)
    spare = history[history["product"].map(products) == "spares"].iloc[-1].copy()
    spare["quantity"] = "40"
    pd.concat([history, spare.to_frame().T]).to_csv(inputs / "history.csv", index=False)
    config = make_config(tmp_path, inputs=inputs)
    rerun = run_partitions(build_definitions(config), dg.DagsterInstance.ephemeral(), "2026-11-30",
                           ["consumables", "spares"],
                           all_classes=["consumables", "seasonal", "spares"])
    assert not rerun.blocking_checks_pass and rerun.results["spares"].success
    # spares passed and wrote new versions, which the pipeline sees ...
    new_raw = read_table(store, "raw_history", cycle="2026-11-30", product_class="spares", versions="latest")
    assert len(new_raw) == len(read_table(store, "raw_history", cycle="2026-11-30", product_class="spares")) + 1
    # ... but readers see every table exactly as before: through the reader, and through SQL on the views
    assert open_store(store).published_cycles() == published
    for name in tables:
        pd.testing.assert_frame_equal(read_table(store, name, with_partition=True), before[name], obj=name)
    with duckdb.connect(str(store / "published.duckdb"), read_only=True) as con:
        raw = con.execute("select count(*) from raw_history where partition_class = 'spares'").fetchone()[0]
    assert raw == len(before["raw_history"].query("partition_class == 'spares'"))
    # the summary marks the cycle: published, with a later run that did not complete, naming the class
    print_summary(config, cycle="2026-11-30")
    text = capsys.readouterr().out
    assert "INCOMPLETE:   a later run of cycle 2026-11-30 has not completed; readers still see it as published" in text
    assert "consumables: not complete" in text and "spares: complete" in text and "seasonal: complete" in text
    # so does the cycle's page, above the published tables
    from pipelines.cycle_report import write_cycle_report

    page = write_cycle_report(load_config(config), dg.DagsterInstance.ephemeral(), "2026-11-30").read_text()
    assert "A later run of this cycle has not completed (consumables: not complete" in page

