"""Every blocking check can fail: take a correct output, corrupt one number or one row, see the check fail naming it.

The correct outputs are two partitions of the demo cycle made by the stages'
own runs (`stage_runs.run_partition`): `consumables` (top-down; the demo's
lifecycle cases, pins, returns and outliers) and `spares` with the
`children_forecast` share method and a backtest between `mint_shrink` and
`wls_var` (so its forecast is reconciled and its period basis is stored);
and the publication's input (one version per table of the class, each written
by the run that publishes it). Each check is judged by the function its
stage's `run` (or the publication asset) calls, on the tables as they were
written (`JUDGES`). `MUTATIONS` lists, per blocking rule check
of the catalogue (`pipelines.checks.CHECKS`), one or more corruptions and the
key of the row the check must name; a blocking check without one fails
`test_every_blocking_check_has_a_mutation`. Every asset's schema check
(`<asset>_matches_schema`, blocking) is corrupted the same way for every
pandera model (`pipelines.tables.MODELS`): one cell of a required column
blanked, and so is the publication's. DEVELOPERS.md keeps the table check -> test.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import pandas as pd
import pytest
import yaml
from stage_runs import ROOT, PartitionRun, demo_config, run_partition

from pipelines import checks as C
from pipelines.tables import MODELS

CYCLE = "2026-11-30"
Tables = dict[str, pd.DataFrame]


@pytest.fixture(scope="session")
def runs() -> dict[str, PartitionRun]:
    backtest = yaml.safe_load((ROOT / "config" / "planning.yaml").read_text())["backtest"]
    backtest["strategies"] = ["mint_shrink", "wls_var"]
    # consumables with group seasonality (its config's `auto` needs the backtest, which only spares runs here)
    config = demo_config(
        {"spares": {"method": "children_forecast"}, "consumables": {"seasonality": "group"}}, backtest=backtest
    )
    runs = {
        "consumables": run_partition(config, CYCLE, "consumables"),
        "spares": run_partition(config, CYCLE, "spares", backtest=True),
    }
    runs["publication"] = _publication_case(runs["consumables"])
    return runs


THIS_RUN = "run-that-wrote-every-table"


def _publication_case(run: PartitionRun) -> PartitionRun:
    """The publication's input as its asset builds it: one version per asset table of the class, every one
    written by this run, and each asset's blocking checks (as `assets.publication.publication_asset` collects them)."""
    import dagster as dg

    from pipelines.definitions import ASSETS

    blocking: dict[str, list[str]] = {}
    tables = []
    for a in ASSETS:
        if "publication" in {k.to_user_string() for k in a.keys}:
            continue
        tables += [k.to_user_string() for k in a.keys]
        for spec in a.check_specs:
            if spec.blocking:
                blocking.setdefault(spec.asset_key.to_user_string(), []).append(spec.name)
    versions = pd.DataFrame(
        {
            "asset": tables,
            "shard": "0",
            "file": [f"{t}/{CYCLE}/consumables/0/v1.parquet" for t in tables],
            "rows": [len(run.tables.get(t, ())) for t in tables],
            "run_id": THIS_RUN,
            "written_at": "2026-11-30T06:00:00+00:00",
        }
    )
    settings = {"instance": dg.DagsterInstance.ephemeral(), "blocking": blocking, "trusted": set()}
    return PartitionRun(run.config, {"publication_versions": versions}, {"publication": settings})


# ------------------------------------------------------------------ the checks, as the stages judge them


def _history_checks(run: PartitionRun, t: Tables):
    from pipelines.stages.cleaned_history import history_checks

    return history_checks(
        t["raw_history"], t["cleaned_history"], t["rejected_rows"], t["history_corrections"],
        run.settings["cleaned_history"],
    )


def _forecast_checks(run: PartitionRun, t: Tables):
    from pipelines.stages.statistical_forecast import forecast_checks

    return forecast_checks(
        t["parent_forecast"], t["statistical_forecast"], t["customer_spans"], t["products"], run.config.calendar.period
    )


def _upper_level_checks(run: PartitionRun, t: Tables):
    from pipelines.engines.upper_levels import upper_level_checks

    levels = tuple(run.config.hierarchy.upper_levels)
    return upper_level_checks(t["upper_level_forecast"], t["parent_forecast"], t["products"], levels)


def _reconciliation_checks(run: PartitionRun, t: Tables):
    from pipelines.stages import reconciliation

    return reconciliation.run(
        t["parent_forecast"], t["statistical_forecast"], t["customer_spans"], t["products"], t["cycle_calendar"],
        run.settings["reconciliation"],
    ).checks


_SPLITS: dict[int, object] = {}


def _split(run: PartitionRun):
    """The plan's split of the run's inputs, made once per run."""
    from pipelines.stages import plan_measures

    if id(run) in _SPLITS:
        return _SPLITS[id(run)]
    t = run.tables
    names = ("parent_forecast", "statistical_forecast", "reinitialized_target", "share_tables", "lifecycle_history",
             "products", "customer_spans", "adjustments", "pins", "cycle_calendar")
    _SPLITS[id(run)] = plan_measures.split(**{n: t[n] for n in names}, settings=run.settings["plan_measures"])[0]
    return _SPLITS[id(run)]


def _plan_checks(run: PartitionRun, t: Tables):
    from pipelines.stages.plan_measures import plan_checks

    # the split's parent values, pins and overflow come from the inputs, not from the plan being judged
    return plan_checks(t["plan_measures"], _split(run), run.settings["plan_measures"])


def _shares_check(run: PartitionRun, t: Tables):
    from pipelines.engines.proofs import find_shares_not_summing_to_one
    from pipelines.results import CheckRows

    return {C.SHARES_SUM_TO_ONE: CheckRows(find_shares_not_summing_to_one(t["reinitialized_target"]))}


def _proven_versions(run: PartitionRun, t: Tables) -> pd.DataFrame:
    from pipelines.store.dagster_io import prove_checks

    s = run.settings["publication"]
    return prove_checks(s["instance"], THIS_RUN, t["publication_versions"], s["blocking"], s["trusted"])


def _publication_checks(run: PartitionRun, t: Tables):
    from pipelines.results import CheckRows

    # as assets.publication: the versions whose proof failed are the failing rows
    versions = _proven_versions(run, t)
    unproven = versions[~versions["proven"].astype(bool)]
    return {C.TABLES_PASSED_THEIR_CHECKS: CheckRows(unproven[["asset", "shard", "run_id", "proof"]])}


def _pins_references(run: PartitionRun, t: Tables):
    from pipelines.results import CheckRows
    from pipelines.stages.master_data import unknown_references

    # as the pins stage judges its class's rows (pipelines.stages.master_data.class_input_run)
    measures = run.settings["pins"].measures
    failing = unknown_references("pins", t["pins"], t["product_class_map"], t["customer_spans"], measures, "pins.csv")
    return {C.REFERENCES_KNOWN: CheckRows(failing)}


JUDGES: dict[str, Callable[[PartitionRun, Tables], dict]] = {
    C.EVERY_RAW_ROW_ACCOUNTED: _history_checks,
    C.CORRECTIONS_EXPLAIN_CHANGES: _history_checks,
    C.SHARES_SUM_TO_ONE: _shares_check,
    C.NO_VOLUME_AFTER_PHASE_OUT: _forecast_checks,
    C.NO_VOLUME_OUTSIDE_ACTIVE_SPAN: _forecast_checks,
    C.NO_NEGATIVE_FORECAST: _forecast_checks,
    C.CHILDREN_SUM_TO_PARENT: _reconciliation_checks,
    C.UPPER_LEVELS_COHERENT: _upper_level_checks,
    C.EVERY_ACTIVE_PARENT_HAS_CHILDREN: _reconciliation_checks,
    C.MEASURES_SUM_TO_PARENT: _plan_checks,
    C.PINS_KEPT: _plan_checks,
    C.TABLES_PASSED_THEIR_CHECKS: _publication_checks,
    C.REFERENCES_KNOWN: _pins_references,  # blocking on pins only; the WARN inputs: tests/test_master_data.py
}


def failing_rows(check: str, run: PartitionRun, tables: Tables | None = None) -> pd.DataFrame:
    return JUDGES[check](run, {**run.tables, **(tables or {})})[check].rows


def names_row(rows: pd.DataFrame, key: dict) -> bool:
    """Some failing row holds every value of `key` (dates compared as dates)."""
    hit = np.ones(len(rows), dtype=bool)
    for column, value in key.items():
        if column not in rows.columns:
            return False
        if isinstance(value, pd.Timestamp):
            hit &= (pd.to_datetime(rows[column]) == value).to_numpy()
        else:
            hit &= (rows[column].astype(object).to_numpy() == value)
    return bool(hit.any())


# ------------------------------------------------------------------ the corruptions


def _key(row: pd.Series, columns) -> dict:
    return {c: row[c] for c in columns}


LEAF_PERIOD = ["product", "site", "customer", "period_start"]
PARENT_PERIOD = ["product", "site", "period_start"]


def _changed(frame: pd.DataFrame, index, column: str, value) -> pd.DataFrame:
    out = frame.copy()
    out.loc[index, column] = value
    return out


def cleaned_lines_plus_one(t: Tables):
    cleaned = t["cleaned_history"]
    i = cleaned.index[cleaned["lines"] > 0][0]
    return {"cleaned_history": _changed(cleaned, i, "lines", cleaned.at[i, "lines"] + 1)}, _key(
        cleaned.loc[i], ["product", "site", "customer"]
    )


def rejected_row_lost(t: Tables):
    rejected = t["rejected_rows"]
    row = rejected.iloc[0]
    return {"rejected_rows": rejected.iloc[1:]}, _key(row, ["product", "site", "customer"])


def cleaned_quantity_changed(t: Tables):
    cleaned = t["cleaned_history"]
    i = cleaned.index[cleaned["quantity"] > 0][len(cleaned) // 3 if len(cleaned) > 3 else 0]
    return {"cleaned_history": _changed(cleaned, i, "quantity", cleaned.at[i, "quantity"] + 1.0)}, _key(
        cleaned.loc[i], LEAF_PERIOD
    )


def correction_row_lost(t: Tables):
    corrections = t["history_corrections"]
    row = corrections.iloc[0]
    return {"history_corrections": corrections.iloc[1:]}, _key(row, LEAF_PERIOD)


def share_changed(t: Tables):
    target = t["reinitialized_target"]
    i = target.index[target["share"] > 0][0]
    return {"reinitialized_target": _changed(target, i, "share", target.at[i, "share"] + 0.01)}, _key(
        target.loc[i], PARENT_PERIOD
    )


def zero_reason_dropped(t: Tables):
    target = t["reinitialized_target"]
    i = target.index[target["zero_reason"].notna()][0]
    return {"reinitialized_target": _changed(target, i, "zero_reason", None)}, _key(target.loc[i], PARENT_PERIOD)


def _leaf_with_span(t: Tables) -> pd.DataFrame:
    spans = t["customer_spans"][["product", "site", "customer", "active_from", "active_to"]]
    return t["statistical_forecast"].reset_index().merge(spans, on=["product", "site", "customer"])


def volume_after_span_end(t: Tables):
    leaf = _leaf_with_span(t)
    row = leaf[leaf["active_to"].notna() & (leaf["period_start"] > leaf["active_to"])].iloc[0]
    return {"statistical_forecast": _changed(t["statistical_forecast"], row["index"], "forecast", 5.0)}, _key(
        row, LEAF_PERIOD
    )


def volume_before_span_start(t: Tables):
    leaf = _leaf_with_span(t)
    start_week = pd.to_datetime(leaf["active_from"]).dt.to_period("W-SUN").dt.start_time
    row = leaf[leaf["active_from"].notna() & (leaf["period_start"] < start_week)].iloc[0]
    return {"statistical_forecast": _changed(t["statistical_forecast"], row["index"], "forecast", 5.0)}, _key(
        row, LEAF_PERIOD
    )


def parent_volume_after_product_end(t: Tables):
    parent, products = t["parent_forecast"], t["products"]
    ended = parent.merge(products[["product", "active_to"]], on="product").set_index(parent.index)
    i = ended.index[ended["active_to"].notna() & (ended["period_start"] > ended["active_to"])][0]
    return {"parent_forecast": _changed(parent, i, "forecast", 5.0)}, _key(parent.loc[i], PARENT_PERIOD)


def negative_leaf(t: Tables):
    leaf = t["statistical_forecast"]
    i = leaf.index[leaf["forecast"] > 0][0]
    return {"statistical_forecast": _changed(leaf, i, "forecast", -1.0)}, _key(leaf.loc[i], LEAF_PERIOD)


def _compared_leaf(t: Tables, middle: bool = False) -> int:
    """A leaf row with volume in a parent period the lifecycle did not set to 0 (the first, or the middle one)."""
    leaf, parent = t["statistical_forecast"], t["parent_forecast"]
    zeroed = parent.loc[parent["zero_reason"].notna(), PARENT_PERIOD].assign(zeroed=True)
    flagged = leaf.reset_index().merge(zeroed, on=PARENT_PERIOD, how="left")
    ok = flagged[flagged["zeroed"].isna() & (flagged["forecast"] > 1.0)]
    return int(ok["index"].iloc[len(ok) // 2 if middle else 0])


def leaf_plus_one(t: Tables):
    leaf = t["statistical_forecast"]
    i = _compared_leaf(t)
    return {"statistical_forecast": _changed(leaf, i, "forecast", leaf.at[i, "forecast"] + 1.0)}, _key(
        leaf.loc[i], PARENT_PERIOD
    )


def leaf_off_by_1e_7(t: Tables):
    # 1e-7 of one leaf of a reconciled parent: far below a unit, far above the 1e-9 relative tolerance
    leaf = t["statistical_forecast"]
    i = _compared_leaf(t, middle=True)
    return {"statistical_forecast": _changed(leaf, i, "forecast", leaf.at[i, "forecast"] * (1 + 1e-7))}, _key(
        leaf.loc[i], PARENT_PERIOD
    )


def strategy_forecast_changed(t: Tables):
    parent = t["parent_forecast"]
    i = parent.index[parent["zero_reason"].isna() & (parent["strategy_forecast"] > 1.0)][0]
    value = parent.at[i, "strategy_forecast"] * 1.01
    return {"parent_forecast": _changed(parent, i, "strategy_forecast", value)}, _key(parent.loc[i], PARENT_PERIOD)


def upper_node_plus_one(t: Tables):
    upper = t["upper_level_forecast"]
    i = upper.index[upper["level"] == "product_family"][0]
    return {"upper_level_forecast": _changed(upper, i, "forecast", upper.at[i, "forecast"] + 1.0)}, _key(
        upper.loc[i], ["level", "node", "period_start"]
    )


def reconciled_parent_moved_under_its_product(t: Tables):
    # a MinT parent's strategy_forecast off by 1 %: its product node (the level right above) no longer holds it
    parent = t["parent_forecast"]
    i = parent.index[parent["strategy_forecast"] > 1.0][0]
    moved = _changed(parent, i, "strategy_forecast", parent.at[i, "strategy_forecast"] * 1.01)
    return {"parent_forecast": moved}, {"level": "product", "node": parent.at[i, "product"],
                                        "period_start": parent.at[i, "period_start"], "column": "strategy_forecast"}


def parent_resummed_from_wrong_leaves(t: Tables):
    # the flaw of a re-summing cycle: one leaf lost 2 units and the final parent was re-summed from the leaves,
    # so the two still agree; the strategy's own value is the judge
    leaf, parent = t["statistical_forecast"], t["parent_forecast"]
    i = _compared_leaf(t)
    key = _key(leaf.loc[i], PARENT_PERIOD)
    j = parent.index[(parent[PARENT_PERIOD] == pd.Series(key)).all(axis=1)][0]
    return {
        "statistical_forecast": _changed(leaf, i, "forecast", leaf.at[i, "forecast"] - 2.0),
        "parent_forecast": _changed(parent, j, "forecast", parent.at[j, "forecast"] - 2.0),
    }, key


def leaf_volume_in_zeroed_period(t: Tables):
    leaf, parent = t["statistical_forecast"], t["parent_forecast"]
    zeroed = parent.loc[parent["zero_reason"].notna(), PARENT_PERIOD]
    i = leaf.reset_index().merge(zeroed, on=PARENT_PERIOD)["index"].iloc[0]
    return {"statistical_forecast": _changed(leaf, i, "forecast", 3.0)}, _key(leaf.loc[i], PARENT_PERIOD)


def parent_children_dropped(t: Tables):
    leaf = t["statistical_forecast"]
    key = _key(leaf.iloc[len(leaf) // 2], ["product", "site"])
    mine = (leaf["product"] == key["product"]) & (leaf["site"] == key["site"])
    return {"statistical_forecast": leaf[~mine]}, key


def parent_dropped_everywhere(t: Tables):
    leaf, parent = t["statistical_forecast"], t["parent_forecast"]
    key = _key(parent.iloc[0], ["product", "site"])

    def drop(f):
        return f[~((f["product"] == key["product"]) & (f["site"] == key["site"]))]

    return {"statistical_forecast": drop(leaf), "parent_forecast": drop(parent)}, key


def measure_value_changed(t: Tables, measure: str):
    plan = t["plan_measures"]
    i = plan.index[(plan["measure"] == measure) & ~plan["pinned"] & (plan["value"] > 0)][0]
    return {"plan_measures": _changed(plan, i, "value", plan.at[i, "value"] + 1.0)}, _key(
        plan.loc[i], ["measure", "product", "site", "period_start"]
    )


def pin_changed(t: Tables):
    plan = t["plan_measures"]
    i = plan.index[plan["pinned"]][0]
    return {"plan_measures": _changed(plan, i, "value", plan.at[i, "value"] + 1.0)}, _key(
        plan.loc[i], LEAF_PERIOD + ["measure"]
    )


def pinned_row_lost(t: Tables):
    plan = t["plan_measures"]
    i = plan.index[plan["pinned"]][-1]
    return {"plan_measures": plan.drop(index=i)}, _key(plan.loc[i], LEAF_PERIOD + ["measure"])


def version_from_an_unknown_run(t: Tables):
    # a table version this run did not write (a rebuild reused it) whose run the instance does not know
    versions = t["publication_versions"]
    i = versions.index[versions["asset"] == "share_tables"][0]
    return {"publication_versions": _changed(versions, i, "run_id", "run-nobody-knows")}, {"asset": "share_tables"}


def version_never_written(t: Tables):
    versions = t["publication_versions"]
    i = versions.index[versions["asset"] == "reconciliation"][0]
    return {"publication_versions": _changed(versions, i, "file", None)}, {"asset": "reconciliation"}


def pin_on_unknown_customer(t: Tables):
    pins = t["pins"]
    i = pins.index[0]
    return {"pins": _changed(pins, i, "customer", "C-NOBODY")}, {"customer": "C-NOBODY", "column": "customer"}


def pin_on_unknown_measure(t: Tables):
    pins = t["pins"]
    i = pins.index[-1]
    return {"pins": _changed(pins, i, "measure", "no_such_measure")}, {"value": "no_such_measure", "row": int(i)}


@dataclass(frozen=True)
class Mutation:
    check: str
    partition: str
    corrupt: Callable[[Tables], tuple[Tables, dict]]

    @property
    def id(self) -> str:
        return f"{self.check}-{self.partition}-{getattr(self.corrupt, '__name__', 'corrupt')}"


def _named(fn, name):
    fn.__name__ = name
    return fn


MUTATIONS = [
    Mutation(C.EVERY_RAW_ROW_ACCOUNTED, "consumables", cleaned_lines_plus_one),
    Mutation(C.EVERY_RAW_ROW_ACCOUNTED, "consumables", rejected_row_lost),
    Mutation(C.CORRECTIONS_EXPLAIN_CHANGES, "consumables", cleaned_quantity_changed),
    Mutation(C.CORRECTIONS_EXPLAIN_CHANGES, "consumables", correction_row_lost),
    Mutation(C.SHARES_SUM_TO_ONE, "consumables", share_changed),
    Mutation(C.SHARES_SUM_TO_ONE, "consumables", zero_reason_dropped),
    Mutation(C.NO_VOLUME_AFTER_PHASE_OUT, "consumables", volume_after_span_end),
    Mutation(C.NO_VOLUME_OUTSIDE_ACTIVE_SPAN, "consumables", volume_before_span_start),
    Mutation(C.NO_VOLUME_OUTSIDE_ACTIVE_SPAN, "consumables", parent_volume_after_product_end),
    Mutation(C.NO_NEGATIVE_FORECAST, "spares", negative_leaf),
    Mutation(C.CHILDREN_SUM_TO_PARENT, "consumables", leaf_plus_one),
    Mutation(C.CHILDREN_SUM_TO_PARENT, "consumables", parent_resummed_from_wrong_leaves),
    Mutation(C.CHILDREN_SUM_TO_PARENT, "consumables", leaf_volume_in_zeroed_period),
    Mutation(C.CHILDREN_SUM_TO_PARENT, "spares", leaf_off_by_1e_7),
    Mutation(C.CHILDREN_SUM_TO_PARENT, "spares", strategy_forecast_changed),
    Mutation(C.UPPER_LEVELS_COHERENT, "consumables", upper_node_plus_one),
    Mutation(C.UPPER_LEVELS_COHERENT, "spares", reconciled_parent_moved_under_its_product),
    Mutation(C.EVERY_ACTIVE_PARENT_HAS_CHILDREN, "consumables", parent_children_dropped),
    Mutation(C.EVERY_ACTIVE_PARENT_HAS_CHILDREN, "spares", parent_dropped_everywhere),
    Mutation(C.MEASURES_SUM_TO_PARENT, "consumables",
             _named(lambda t: measure_value_changed(t, "statistical_forecast"), "pro_rata_leaf_changed")),
    Mutation(C.MEASURES_SUM_TO_PARENT, "consumables",
             _named(lambda t: measure_value_changed(t, "list_price"), "replicated_price_changed")),
    Mutation(C.PINS_KEPT, "consumables", pin_changed),
    Mutation(C.PINS_KEPT, "consumables", pinned_row_lost),
    Mutation(C.TABLES_PASSED_THEIR_CHECKS, "publication", version_from_an_unknown_run),
    Mutation(C.TABLES_PASSED_THEIR_CHECKS, "publication", version_never_written),
    Mutation(C.REFERENCES_KNOWN, "consumables", pin_on_unknown_customer),
    Mutation(C.REFERENCES_KNOWN, "consumables", pin_on_unknown_measure),
]


# ------------------------------------------------------------------ the tests


def test_every_blocking_check_has_a_mutation():
    blocking = {c.name for c in C.CHECKS if c.blocking}
    assert blocking == {m.check for m in MUTATIONS} == set(JUDGES)


@pytest.mark.parametrize("partition", ["consumables", "spares", "publication"])
def test_every_blocking_check_passes_on_the_correct_output(runs, partition):
    run = runs[partition]
    for check in {m.check for m in MUTATIONS if m.partition == partition}:
        rows = failing_rows(check, run)
        assert rows.empty, f"{check} fails on the correct {partition} output:\n{rows.head()}"
    # the spares partition is reconciled (the backtest chose between MinT and WLS) and stores its period basis
    if partition == "spares":
        assert set(run.tables["parent_forecast"]["strategy"]) <= {"mint_shrink", "wls_var"}
        assert len(run.tables["period_basis"]) > 0 and len(run.tables["forecast_fitted_values"]) > 0


@pytest.mark.parametrize("mutation", MUTATIONS, ids=lambda m: m.id)
def test_a_corrupted_output_fails_the_check_naming_the_row(runs, mutation):
    run = runs[mutation.partition]
    corrupted, key = mutation.corrupt(run.tables)
    rows = failing_rows(mutation.check, run, corrupted)
    assert len(rows) > 0, f"{mutation.id}: the check passed on a corrupted output"
    assert names_row(rows, key), f"{mutation.id}: the failing rows do not name {key}:\n{rows.head()}"


# ------------------------------------------------------------------ the schema checks, one per asset


def _model(name: str):
    from pipelines.schemas_forecast import ClassPublication

    return ClassPublication if name == "publication" else MODELS[name]


def _schema_case(runs, name: str) -> tuple[pd.DataFrame, str]:
    """A correct table of asset `name` with rows, and a required column that is not a flag."""
    if name == "publication":
        frame = _proven_versions(runs["publication"], runs["publication"].tables)
    else:
        frame = next((r.tables[name] for r in runs.values() if len(r.tables.get(name, ()))), None)
    assert frame is not None, f"no partition of the fixture gives {name} a row: extend `runs` so it does"
    columns = _model(name).to_schema().columns
    required = [c for c, col in columns.items() if not col.nullable and str(col.dtype) != "bool"]
    assert required, f"{name}: no required column to blank"
    return frame, required[0]


def test_every_asset_has_its_schema_mutation():
    from pipelines.definitions import ASSETS

    assets = {k.to_user_string() for a in ASSETS for k in a.keys}
    assert assets == set(MODELS) | {"publication"}


@pytest.mark.parametrize("name", sorted(MODELS) + ["publication"])
def test_a_blanked_cell_fails_the_assets_schema_check_naming_the_row(runs, name):
    from assets.common import validate

    frame, column = _schema_case(runs, name)
    _, passed = validate(frame, _model(name), name)
    assert passed.passed, f"{name}_matches_schema fails on the correct output"
    i = frame.index[len(frame) // 2]
    broken = frame.copy()
    broken[column] = broken[column].astype(object)
    broken.loc[i, column] = None
    _, check = validate(broken, _model(name), name)
    assert not check.passed and check.check_name == f"{name}_matches_schema"
    assert check.metadata["failing_row_count"].value == 1
    # the failing rows sample is that row (the markdown table of the frame's row, other cells as they were)
    sample = check.metadata["failing_rows_sample"].value
    others = [c for c in frame.columns if c != column and frame[c].dtype == object and frame.at[i, c]]
    assert all(str(broken.at[i, c]) in sample for c in others[:3])


def _keyed(name: str) -> list[str]:
    unique = _model(name).to_schema().unique or []
    return list(unique) if all(isinstance(c, str) for c in unique) else list(unique[0])


@pytest.mark.parametrize("name", sorted(n for n in MODELS if _keyed(n)))
def test_a_duplicated_key_fails_the_assets_schema_check_naming_the_row(runs, name):
    """One row of a correct table repeated at the end (ids and all): the unique key fails the schema check,
    which names the row (tables with ids: their integer proof finds the pair, pandera's own check names it)."""
    from assets.common import validate

    frame = next((r.tables[name] for r in runs.values() if len(r.tables.get(name, ())) > 1), None)
    if frame is None:
        pytest.skip(f"no partition of the fixture gives {name} two rows")
    i = frame.index[len(frame) // 2]
    broken = pd.concat([frame, frame.loc[[i]]], ignore_index=True)
    _, check = validate(broken, _model(name), name)
    assert not check.passed and check.check_name == f"{name}_matches_schema"
    assert "multiple_fields_uniqueness" in check.metadata["failures_by_check"].value
    assert check.metadata["failing_row_count"].value == 2  # the row and its copy
