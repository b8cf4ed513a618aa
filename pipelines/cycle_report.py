"""The cycle's HTML report, from the store and the Dagster instance.

The page (pipelines/engines/report_html.py renders it) covers every class of one
cycle: the classes' tables come from the store as published (with a notice
when the cycle is not published, or a later run of it did not complete), the
checks' latest status per
partition from the runs of that partition in the instance (so a class's
rebuild shows its new results, and a run a blocking check stopped shows the
failure). It is written to var/reports/<cycle>/cycle_report.html, next to the
charts the `cycle_report` asset draws.
"""

from __future__ import annotations

from pathlib import Path

import dagster as dg
import pandas as pd

from pipelines.check_failures import failure_of
from pipelines.checks import CHECKS, schema_check
from pipelines.class_view import class_choice
from pipelines.config import PlanningConfig
from pipelines.engines import report_charts, report_html
from pipelines.partitions import partition_key
from pipelines.resources import read_table, report_folder
from pipelines.shard_charts import PARENT_PANELS, SHARE_PANELS, read_class_frames
from pipelines.shards import partition_classes, split_class_key
from pipelines.tables import MODELS

REPORT_FILE = "cycle_report.html"
CHART_KINDS = ("parents", "shares")
CHECK_COLUMNS = [
    "product_class", "asset", "check", "passed", "severity", "description", "run_id", "first_rows", "what_to_do"
]


def check_descriptions() -> dict[tuple[str, str], str]:
    """(asset, check) -> the check's description, from the catalogue of checks and the tables' models."""
    checks = list(CHECKS) + [schema_check(name, model) for name, model in MODELS.items()]
    return {(c.asset, c.name): c.description for c in checks}


def latest_check_results(
    instance: dg.DagsterInstance, cycle: str, classes: list[str], runs_per_class: int = 20
) -> pd.DataFrame:
    """The newest evaluation of every check in each class's partition of `cycle` (from the runs of that partition);
    `classes` are partition keys (a class cut into shards: each shard's key, its rows named by the class)."""
    descriptions = check_descriptions()
    rows = []
    for class_key in classes:
        key, product_class = str(partition_key(cycle, class_key)), split_class_key(class_key)[0]
        runs = instance.get_runs(filters=dg.RunsFilter(tags={"dagster/partition": key}), limit=runs_per_class)
        seen: set[tuple[str, str]] = set()
        for run in runs:  # newest first
            for entry in instance.all_logs(run.run_id, of_type=dg.DagsterEventType.ASSET_CHECK_EVALUATION):
                evaluation = entry.dagster_event.event_specific_data
                name = (evaluation.asset_key.to_user_string(), evaluation.check_name)
                if name in seen:
                    continue
                seen.add(name)
                failure = failure_of(evaluation, descriptions.get(name, ""), product_class)
                rows.append(
                    {
                        "product_class": product_class,
                        "asset": name[0],
                        "check": name[1],
                        "passed": bool(evaluation.passed),
                        "severity": evaluation.severity.value,
                        "description": descriptions.get(name, ""),
                        "run_id": run.run_id,
                        "first_rows": "" if evaluation.passed else failure.rows,
                        "what_to_do": "" if evaluation.passed else failure.advice,
                    }
                )
    return pd.DataFrame(rows, columns=CHECK_COLUMNS)


def class_charts(config: PlanningConfig, cycle: str, name: str, folder: Path) -> list[str]:
    """The chart files of a class cut into shards drawn from every shard's published tables (the class total and
    its largest parents over all shards, as the `cycle_report` stage draws one partition's), named by the class;
    drawn again only when the cycle was published after them. [] for a class not cut or a cycle not published.

    The class is never read whole: each shard is read and reduced on its own to what the charts draw
    (`pipelines.shard_charts`), the same numbers as a draw from the whole class."""
    from pipelines.store import open_store

    published = open_store(config.store.path).published_path(cycle)
    if len(partition_classes(config, [name])) == 1 or not published.exists():
        return []
    names = [report_charts.chart_file_name(kind, name, cycle) for kind in CHART_KINDS]
    if all((folder / n).exists() and (folder / n).stat().st_mtime >= published.stat().st_mtime for n in names):
        return names
    frames = read_class_frames(config.store.path, cycle, name)
    if frames is None:
        return []
    where = {"product_class": name, "cycle_date": cycle, "period": config.calendar.period}
    pictures = [
        report_charts.parent_chart(frames.history_sums, frames.forecast, top_parents=PARENT_PANELS, **where),
        report_charts.share_chart(
            frames.share_history, frames.target, shares=frames.shares, top_parents=SHARE_PANELS, **where
        ),
    ]
    for file_name, png in zip(names, pictures, strict=True):
        (folder / file_name).write_bytes(png)
    return names


def publication_notice(config: PlanningConfig, cycle: str) -> str | None:
    """A line for the page when the cycle is not published, or a later run of it has not completed."""
    from pipelines.store import open_store

    store = open_store(config.store.path)
    if not store.check_layout():
        return None
    status = store.status(cycle, list(config.product_classes))
    if not status.incomplete:
        return None
    waiting = "; ".join(status.describe_class(k) for k in status.incomplete)
    if status.is_published:
        return (f"A later run of this cycle has not completed ({waiting}). The tables below are the cycle as published "
                f"{status.published['published_at'][:19]} UTC; the checks are the latest of each class.")
    return (f"This cycle is not published: nothing of it is shown until every class passed its blocking checks "
            f"({waiting}). The checks are the latest of each class.")


def write_cycle_report(config: PlanningConfig, instance: dg.DagsterInstance, cycle: str) -> Path:
    """Render the cycle's page from the store and the instance; the path written."""
    store = Path(config.store.path)
    folder = report_folder(
        config.model_copy(update={"calendar": config.calendar.model_copy(update={"cycle_date": cycle})})
    )
    folder.mkdir(parents=True, exist_ok=True)

    def table(name: str) -> pd.DataFrame | None:
        return read_table(store, name, cycle=cycle) if store.exists() else None

    shares = table("share_tables")
    classes = list(config.product_classes)
    checks = latest_check_results(instance, cycle, partition_classes(config))
    # the decision the cycle stored, not one made again from today's config; a class cut into shards once, with
    # the class's figures
    choice = class_choice(store, config, cycle, table("strategy_choice")) if store.exists() else None
    drift = table("share_drift")
    charts = {
        c: class_charts(config, cycle, c, folder)  # a class cut into shards: the class's charts once published,
        or [  # else each shard's
            n
            for key in partition_classes(config, [c])
            for n in (report_charts.chart_file_name(k, key, cycle) for k in CHART_KINDS)
            if (folder / n).exists()
        ]
        for c in classes
    }
    page = report_html.cycle_report_html(
        notice=publication_notice(config, cycle),
        cycle_date=cycle,
        share_tables=shares if shares is not None else pd.DataFrame(columns=["product_class"]),
        checks=[
            (
                f"{r.asset} [{r.product_class}]", r.check, r.passed, r.severity, r.description, r.first_rows,
                r.what_to_do,
            )
            for r in checks.itertuples(index=False)
        ],
        parent_forecast=table("parent_forecast"),
        strategy_choice=choice,
        share_tuning=table("share_tuning"),
        rejected_rows=table("rejected_rows"),
        movers=drift[report_html.MOVER_COLUMNS] if drift is not None and len(drift) else None,
        charts={c: names for c, names in charts.items() if names},
        calendar=table("cycle_calendar"),
    )
    path = folder / REPORT_FILE
    path.write_text(page, encoding="utf-8")
    return path
