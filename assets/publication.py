"""Asset `publication`: the class complete with the table versions it used; the cycle published when every class is.

Downstream of every asset, so Dagster's blocking checks stop it when any of
them fails in the run. It records the class as complete with the latest
version of each of its tables, after proving that each passed its blocking
checks in the run that wrote it; when every configured class of the cycle is
complete it publishes the cycle (pipelines/store/store.py), and readers see it.
"""

import dagster as dg

from assets.common import rule_check, schema_check_spec, table_metadata, validate
from pipelines.checks import TABLES_PASSED_THEIR_CHECKS, check_of
from pipelines.partitions import cycle_class_partitions, split_key
from pipelines.publication import (
    not_complete_message,
    proven_versions,
    publication_figures,
    publish_class,
    unproven_versions,
)
from pipelines.resources import PlanningConfigResource
from pipelines.schemas_forecast import ClassPublication
from pipelines.store import open_store

PUBLICATION = "publication"
PROOF_TEXT = check_of(PUBLICATION, TABLES_PASSED_THEIR_CHECKS).description
PROOF_WHAT = PROOF_TEXT.split(". When")[0]


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
        cycle, product_class = split_key(context.partition_key)
        partition = {"partition_cycle": cycle, "partition_class": product_class}  # on every check result
        store, run_id = open_store(planning.config.store.path), context.run.run_id
        versions = proven_versions(store, context.instance, run_id, cycle, product_class, tables, blocking)
        versions, schema_check = validate(versions, ClassPublication, PUBLICATION, partition=partition)
        unproven = unproven_versions(versions)
        proof = rule_check(PUBLICATION, TABLES_PASSED_THEIR_CHECKS, unproven, what=PROOF_WHAT, partition=partition)
        complete = schema_check.passed and unproven.empty
        if not complete:
            context.log.error(not_complete_message(cycle, product_class, unproven))
        status = None if not complete else publish_class(
            store, versions, planning.config, context.instance, cycle, product_class, run_id, context.log
        )
        figures = publication_figures(status, store.views_path)
        return dg.MaterializeResult(metadata=table_metadata(versions, **figures), check_results=[schema_check, proof])

    return publication
