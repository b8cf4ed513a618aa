"""The publication of a class: the table versions it used, their proof, the class recorded complete.

The terminal asset `publication` (assets/publication.py) is downstream of
every asset. It lists the latest version of each of the class's tables
(`table_versions`), proves each passed its blocking checks in the run that
wrote it (`proven_versions`, with `pipelines.store.dagster_io.prove_checks`),
and, when every one is proven, records the class complete (`publish_class`);
the store publishes the cycle once every configured class is complete
(pipelines/store/store.py).
"""

from __future__ import annotations

from pathlib import Path
from typing import Protocol

import pandas as pd

from pipelines.config import PlanningConfig
from pipelines.cycle_report import write_cycle_report
from pipelines.store import CycleStatus, Store
from pipelines.store.dagster_io import prove_checks


class Logger(Protocol):
    """What the publication tells: `info` what it did, `warning` a wait (a Dagster log or a `logging.Logger`)."""

    def info(self, message: str) -> None: ...

    def warning(self, message: str) -> None: ...


VERSION_COLUMNS = ["asset", "shard", "file", "rows", "run_id", "written_at"]
UNPROVEN_COLUMNS = ["asset", "shard", "run_id", "proof"]


def table_versions(
    store: Store, cycle: str, product_class: str, tables: list[str], shards: list[str] | None = None
) -> pd.DataFrame:
    """The latest version of each table's partition, one row per shard (a table never written: file None).

    `shards`: the class's shards under the config (`pipelines.shards.store_shards`); a folder of another
    shard count (left from before the config's scale changed) is left out, a shard never written is a row."""
    rows = []
    for table in tables:
        latest = store.latest(table, cycle, product_class)
        if shards is not None:
            latest = {s: latest.get(s) for s in shards}
        if not latest:
            rows.append({"asset": table, "shard": "0", "file": None, "rows": 0, "run_id": None, "written_at": None})
        for shard, p in latest.items():
            if p is None:
                rows.append({"asset": table, "shard": shard, "file": None, "rows": 0, "run_id": None,
                             "written_at": None})
                continue
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


def trusted_versions(store: Store, cycle: str, product_class: str) -> set[tuple[str, str, str]]:
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


def proven_versions(
    store: Store, instance, run_id: str, cycle: str, product_class: str, tables: list[str], blocking: dict,
    shards: list[str] | None = None,
) -> pd.DataFrame:
    """`table_versions` with `proven` and `proof` (prove_checks against the Dagster instance's check runs)."""
    versions = table_versions(store, cycle, product_class, tables, shards)
    return prove_checks(instance, run_id, versions, blocking, trusted_versions(store, cycle, product_class))


def unproven_versions(versions: pd.DataFrame, shard: str | None = None) -> pd.DataFrame:
    """The versions not proven, with the proof that failed: the failing rows of `tables_passed_their_checks`.

    `shard`: the run's own shard of a class cut into shards; the other shards' versions are not its to prove
    (`waiting_shards`)."""
    mine = versions if shard is None else versions[versions["shard"] == shard]
    return mine.loc[~mine["proven"].astype(bool), UNPROVEN_COLUMNS]


def waiting_shards(versions: pd.DataFrame, shard: str | None) -> list[str]:
    """The other shards of the class with a table not (yet) written and proven: the class waits for them."""
    if shard is None:
        return []
    others = versions[(versions["shard"] != shard) & ~versions["proven"].astype(bool)]
    return sorted(others["shard"].unique())


ACTIVE = ("NOT_STARTED", "QUEUED", "STARTING", "STARTED")  # a run that may still write its shard


def active_runs_of(instance, cycle: str, product_class: str):
    """shard -> the ids of the Dagster instance's runs of that shard's partition not finished (queued from the UI,
    starting or under way), for `pipelines.store.pending.settle_shard`."""
    import dagster as dg

    from pipelines.partitions import partition_key
    from pipelines.shards import SHARD_MARK
    from pipelines.store.dagster_io import PARTITION_TAG

    statuses = [dg.DagsterRunStatus[s] for s in ACTIVE]

    def runs(shard: str) -> list[str]:
        key = partition_key(cycle, f"{product_class}{SHARD_MARK}{shard}")
        found = instance.get_runs(filters=dg.RunsFilter(statuses=statuses, tags={PARTITION_TAG: str(key)}))
        return [r.run_id for r in found]

    return runs


def not_complete_message(cycle: str, product_class: str, unproven: pd.DataFrame) -> str:
    return f"{cycle}|{product_class} is not recorded complete: " + "; ".join(
        f"{r.asset}: {r.proof}" for r in unproven.itertuples(index=False)
    )


def publish_class(
    store: Store,
    versions: pd.DataFrame,
    config: PlanningConfig,
    instance,
    cycle: str,
    product_class: str,
    run_id: str,
    log: Logger,
) -> CycleStatus:
    """The class recorded complete with the latest pointer of each version (Store.complete_class publishes the
    cycle when every configured class is), the cycle's page written again (published now, or what it waits for),
    and what happened told to `log` (waits for the publish lock as warnings)."""
    recorded: dict[str, dict] = {}
    for r in versions.itertuples(index=False):
        recorded.setdefault(r.asset, {})[r.shard] = store.latest(r.asset, cycle, product_class)[r.shard]
    classes = list(config.product_classes)
    status = store.complete_class(cycle, product_class, recorded, run_id=run_id, classes=classes, say=log.warning)
    page = write_cycle_report(config, instance, cycle)
    log.info(published_message(status, cycle, product_class, run_id, page))
    return status


def published_message(status: CycleStatus, cycle: str, product_class: str, run_id: str, page: Path) -> str:
    """What the publication did: the cycle published by this run, or the classes the cycle still waits for."""
    if status.is_published and status.published["classes"][product_class]["run_id"] == run_id:
        return f"cycle {cycle} published (every class complete); report {page}"
    return f"{cycle}|{product_class} complete; cycle waits for: {', '.join(status.incomplete)}"


def publication_figures(status: CycleStatus | None, views: Path) -> dict:
    """The publication's metadata figures: complete and published or not, what it waits for, the SQL views."""
    if status is None:
        return {"class_complete": False, "cycle_published": False}
    return {
        "class_complete": True,
        "cycle_published": status.is_published,
        "waiting_for": ", ".join(status.incomplete) or "none",
        "published_at": (status.published or {}).get("published_at", "not yet"),
        "sql_views": views,
    }
