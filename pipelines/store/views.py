"""`published.duckdb`: DuckDB views over the published Parquet files, for SQL users.

Rebuilt as a whole at every publication, under a temporary name and renamed
over the old file, so a SQL session that has the old file open keeps reading
the old publication and is never in the publisher's way (no DuckDB file lock
is shared between the pipeline and its readers). Views name absolute file
paths: after moving a store folder, `python -m pipelines views`
writes them again.

    duckdb.connect("var/store/published.duckdb", read_only=True).sql("select * from share_tables limit 5")
"""

from __future__ import annotations

import os
from pathlib import Path

import duckdb
import pandas as pd

from pipelines.store.files import fsync_dir, tmp_name


def _quote(name: str) -> str:
    return '"' + name.replace('"', '""') + '"'


def _literal(text: str) -> str:
    return "'" + text.replace("'", "''") + "'"


def write_views(store) -> Path:
    """Write store.views_path with one view per asset over its published files; the path."""
    target = store.views_path
    tmp = target.parent / tmp_name(target.name)
    written = store.partitions_written("published")
    cycles = pd.DataFrame(
        [
            {
                "partition_cycle": c,
                "published_at": pd.Timestamp(p["published_at"]).tz_localize(None),
                "classes": ", ".join(sorted(p.get("classes", {}))),
                "sequence": int(p.get("sequence", 1)),
            }
            for c in store.published_cycles()
            if (p := store.published(c))
        ],
        columns=["partition_cycle", "published_at", "classes", "sequence"],
    )
    con = duckdb.connect(str(tmp))
    try:
        for asset, group in written.groupby("asset", sort=True):
            files = [
                str((store.partition_dir(asset, r.partition_cycle, r.partition_class, r.shard) / r.file).absolute())
                for r in group.itertuples(index=False)
            ]
            listing = ", ".join(_literal(f) for f in files)
            con.execute(
                f"CREATE VIEW {_quote(asset)} AS SELECT * FROM read_parquet([{listing}], union_by_name = true, "
                "hive_partitioning = false)"
            )
        con.register("written_frame", written)
        con.execute("CREATE TABLE partitions_written AS SELECT * FROM written_frame")
        con.register("cycles_frame", cycles)
        con.execute("CREATE TABLE published_cycles AS SELECT * FROM cycles_frame")
    finally:
        con.close()
    os.replace(tmp, target)
    Path(str(tmp) + ".wal").unlink(missing_ok=True)
    fsync_dir(target.parent)
    return target
