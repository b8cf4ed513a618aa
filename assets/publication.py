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
    active_runs_of,
    not_complete_message,
    proven_versions,
    publication_figures,
    publish_class,
    unproven_versions,
    waiting_shards,
)
from pipelines.resources import PlanningConfigResource
from pipelines.schemas_forecast import ClassPublication
from pipelines.shards import UNSHARDED, split_class_key, store_shards
from pipelines.store import open_store
from pipelines.store.pending import settle_shard

PUBLICATION = "publication"
PROOF_TEXT = check_of(PUBLICATION, TABLES_PASSED_THEIR_CHECKS).description
PROOF_WHAT = PROOF_TEXT.split(". When")[0]


def class_and_shard(key) -> tuple[str, tuple[str, str | None]]:
    """The cycle, the class and the shard (None for a class not cut) of a partition key."""
    cycle, class_key = split_key(key)
    product_class, shard = split_class_key(class_key)
    return cycle, (product_class, None if shard == UNSHARDED else shard)


def is_complete(context: dg.AssetExecutionContext, store, versions, unproven, schema_ok: bool, shard, where) -> bool:
    """Whether the class is complete: its versions valid and proven (else an error in the log), and, for a shard,
    every other shard's too and none pending in this cycle's run, nor queued or under way in the instance (else
    the class waits for them, said in the log: the last shard to finish completes it; `settle_shard`)."""
    if not unproven.empty or not schema_ok:
        context.log.error(not_complete_message(*where, unproven))
        return False
    waiting = waiting_shards(versions, shard)
    if shard is not None:
        cycle, product_class = where
        others = sorted(set(versions["shard"]) - {shard})
        active = active_runs_of(context.instance, cycle, product_class)
        pending = settle_shard(store, cycle, product_class, shard, context.run.run_id, others, active)
        waiting = sorted(set(waiting) | set(pending))
    if waiting:
        context.log.info(f"shard {shard} complete; the class waits for shards {', '.join(waiting)}")
    return not waiting


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
        cycle, (product_class, shard) = class_and_shard(context.partition_key)
        partition = {"partition_cycle": cycle, "partition_class": product_class}  # on every check result
        store, run_id = open_store(planning.config.store.path), context.run.run_id
        versions = proven_versions(store, context.instance, run_id, cycle, product_class, tables, blocking,
                                   store_shards(planning.config, product_class))
        versions, schema_check = validate(versions, ClassPublication, PUBLICATION, partition=partition)
        unproven = unproven_versions(versions, shard)
        proof = rule_check(PUBLICATION, TABLES_PASSED_THEIR_CHECKS, unproven, what=PROOF_WHAT, partition=partition)
        complete = is_complete(context, store, versions, unproven, schema_check.passed, shard, (cycle, product_class))
        status = None if not complete else publish_class(
            store, versions, planning.config, context.instance, cycle, product_class, run_id, context.log
        )
        figures = publication_figures(status, store.views_path)
        return dg.MaterializeResult(metadata=table_metadata(versions, **figures), check_results=[schema_check, proof])

    return publication
