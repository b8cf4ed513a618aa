"""Asset `publication`: the class complete with the table versions it used; the cycle published when every class is.

Downstream of every asset, so Dagster's blocking checks stop it when any of
them fails in the run. It records the class as complete with the latest
version of each of its tables, after proving that each passed its blocking
checks in the run that wrote it; when every configured class of the cycle is
complete it publishes the cycle (pipelines/store/store.py), and readers see it.
"""

import dagster as dg
import pandas as pd

from assets.common import rule_check, schema_check_spec, table_metadata, validate
from pipelines.checks import TABLES_PASSED_THEIR_CHECKS, check_of
from pipelines.cycle_report import write_cycle_report
from pipelines.partitions import cycle_class_partitions, split_key
from pipelines.resources import PlanningConfigResource
from pipelines.schemas_forecast import ClassPublication
from pipelines.store import open_store
from pipelines.store.dagster_io import prove_checks

PUBLICATION = "publication"
PROOF_TEXT = check_of(PUBLICATION, TABLES_PASSED_THEIR_CHECKS).description
VERSION_COLUMNS = ["asset", "shard", "file", "rows", "run_id", "written_at"]


def _versions(store, cycle: str, product_class: str, tables: list[str]) -> pd.DataFrame:
    rows = []
    for table in tables:
        latest = store.latest(table, cycle, product_class)
        if not latest:
            rows.append({"asset": table, "shard": "0", "file": None, "rows": 0, "run_id": None, "written_at": None})
        for shard, p in latest.items():
            rows.append(
                {
                    "asset": table,
                    "shard": shard,
                    "file": p["file"],
                    "rows": int(p["rows"]),
                    "run_id": p.get("run_id", ""),
                    "written_at": p["written_at"],
                }
            )
    return pd.DataFrame(rows, columns=VERSION_COLUMNS)


def _trusted(store, cycle: str, product_class: str) -> set[tuple[str, str, str]]:
    """(asset, shard, file) of the class's last complete record and of the cycle's publication."""
    found = set()
    records = [
        store.class_record(cycle, product_class),
        ((store.published(cycle) or {}).get("classes") or {}).get(product_class),
    ]
    for record in records:
        if record and record.get("state") == "complete":
            for asset, shards in record.get("tables", {}).items():
                found |= {(asset, s, p["file"]) for s, p in shards.items()}
    return found


def publication_asset(stage_assets: list[dg.AssetsDefinition]) -> dg.AssetsDefinition:
    """The terminal asset over `stage_assets` (every asset whose tables a cycle publishes)."""
    keys = [k for a in stage_assets for k in a.keys]
    tables = [k.to_user_string() for k in keys]
    blocking: dict[str, list[str]] = {}
    for a in stage_assets:
        for spec in a.check_specs:
            if spec.blocking:
                blocking.setdefault(spec.asset_key.to_user_string(), []).append(spec.name)

    @dg.asset(
        name=PUBLICATION,
        group_name="publication",
        partitions_def=cycle_class_partitions,
        deps=keys,
        kinds={"parquet", "duckdb"},
        check_specs=[
            schema_check_spec(PUBLICATION, ClassPublication),
            dg.AssetCheckSpec(TABLES_PASSED_THEIR_CHECKS, asset=PUBLICATION, blocking=True, description=PROOF_TEXT),
        ],
        description="Records the class complete with the version of every table it used, once every blocking check "
        "passed; when every class of the cycle is complete, publishes the cycle: summary, explain, the report and the "
        "DuckDB views (var/store/published.duckdb) then show it. Until then they show the last published cycle.",
    )
    def publication(context: dg.AssetExecutionContext, planning: PlanningConfigResource):
        config = planning.config
        cycle, product_class = split_key(context.partition_key)
        partition = {"partition_cycle": cycle, "partition_class": product_class}  # on every check result
        store = open_store(config.store.path)
        versions = prove_checks(
            context.instance,
            context.run.run_id,
            _versions(store, cycle, product_class, tables),
            blocking,
            _trusted(store, cycle, product_class),
        )
        versions, schema_check = validate(versions, ClassPublication, PUBLICATION, partition=partition)
        unproven = versions[~versions["proven"].astype(bool)]
        proof_check = rule_check(
            PUBLICATION,
            TABLES_PASSED_THEIR_CHECKS,
            unproven[["asset", "shard", "run_id", "proof"]],
            what=PROOF_TEXT.split(". When")[0],
            partition=partition,
        )
        if not schema_check.passed or len(unproven):
            context.log.error(
                f"{cycle}|{product_class} is not recorded complete: "
                + "; ".join(f"{r.asset}: {r.proof}" for r in unproven.itertuples(index=False))
            )
            return dg.MaterializeResult(
                metadata=table_metadata(versions, class_complete=False, cycle_published=False),
                check_results=[schema_check, proof_check],
            )
        recorded = {}
        for r in versions.itertuples(index=False):
            recorded.setdefault(r.asset, {})[r.shard] = store.latest(r.asset, cycle, product_class)[r.shard]
        status = store.complete_class(
            cycle,
            product_class,
            recorded,
            run_id=context.run.run_id,
            classes=list(config.product_classes),
            say=context.log.warning,
        )
        page = write_cycle_report(
            config, context.instance, cycle
        )  # the page again: published now, or what it waits for
        if status.is_published and status.published["classes"][product_class]["run_id"] == context.run.run_id:
            context.log.info(f"cycle {cycle} published (every class complete); report {page}")
        else:
            context.log.info(f"{cycle}|{product_class} complete; cycle waits for: {', '.join(status.incomplete)}")
        return dg.MaterializeResult(
            metadata=table_metadata(
                versions,
                class_complete=True,
                cycle_published=status.is_published,
                waiting_for=", ".join(status.incomplete) or "none",
                published_at=(status.published or {}).get("published_at", "not yet"),
                sql_views=dg.MetadataValue.path(str(store.views_path)),
            ),
            check_results=[schema_check, proof_check],
        )

    return publication
