"""Time and size reading the history from PostgreSQL (`inputs.history`) against the same lines from a file.

    nice -n 10 .venv/bin/python benchmarks/history_database.py --lines 2000000 [--chunk-rows 50000] [--repeat 2]

Starts a throwaway PostgreSQL server (tests/postgres_server.py: Debian's
`postgresql`, initdb + pg_ctl in a temp folder), writes `--lines` seeded
history lines (benchmarks/reader.py's generator, about 36 bytes a line) to a
CSV file and COPYs them into a text table, then reads them in a fresh child
process per reader, printing wall time (the fastest of `--repeat` runs),
lines per second and the child's peak RSS (getrusage ru_maxrss; imports
happen before the clock starts):

    query      pipelines.engines.history_database: SQLAlchemy server-side
               cursor, `--chunk-rows` rows at a time, each chunk to Arrow text
    query-all  the same query with chunk_rows = every line (one fetch: what a
               client-side cursor holds at once)
    pandas     pandas.read_sql on the same query (SQLAlchemy, the whole result
               fetched as Python objects first): what reading without chunks costs
    file       pipelines.engines.history_files.load_raw_history on the CSV file

The server, the file and the table are deleted afterwards. Figures go to
benchmarks/README.md.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path[:0] = [str(ROOT / "tests"), str(ROOT / "benchmarks"), str(ROOT)]

from postgres_server import start_server  # noqa: E402
from reader import write_history  # noqa: E402

QUERY = "SELECT row_id, product, site, customer, period_start, quantity FROM history ORDER BY row_id"

CHILD = r"""
import json, resource, sys, time
sys.path.insert(0, {root!r})
from pathlib import Path
import pandas as pd
from pipelines.config_inputs import HistoryQuery, InputsConfig
from pipelines.engines.history_database import load_history_query
from pipelines.engines.history_files import load_raw_history
reader, url, query, chunk, folder = {reader!r}, {url!r}, {query!r}, {chunk!r}, Path({folder!r})
started = time.perf_counter()
if reader == "file":
    lines, _ = load_raw_history(folder)
elif reader == "pandas":
    import sqlalchemy as sa
    engine = sa.create_engine(url)
    with engine.connect() as conn:
        lines = pd.read_sql(sa.text(query), conn)
else:
    history = HistoryQuery(url=url, query=query, chunk_rows=chunk)
    lines, _ = load_history_query(history, InputsConfig(history=history))
seconds = time.perf_counter() - started
peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
print(json.dumps({{"rows": len(lines), "seconds": seconds, "peak_mb": peak}}))
"""


def measure(reader: str, url: str, chunk: int, folder: Path) -> dict:
    code = CHILD.format(root=str(ROOT), reader=reader, url=url, query=QUERY, chunk=chunk, folder=str(folder))
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    if done.returncode != 0:
        raise SystemExit(f"{reader} failed:\n{done.stderr[-2000:]}")
    return json.loads(done.stdout.strip().splitlines()[-1])


def main(argv: list[str] | None = None) -> None:
    p = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--lines", type=int, default=2_000_000)
    p.add_argument("--chunk-rows", type=int, default=50_000)
    p.add_argument("--readers", default="query,query-all,pandas,file")
    p.add_argument("--repeat", type=int, default=2, help="runs per reader; the fastest is printed")
    args = p.parse_args(argv)
    server = start_server()
    pg = next(server)
    try:
        with tempfile.TemporaryDirectory(prefix="apportion-bench-") as tmp:
            folder = Path(tmp)
            path = folder / "history.csv"
            started = time.perf_counter()
            write_history(path, args.lines)
            pg.execute(
                "CREATE TABLE history (row_id bigserial PRIMARY KEY, product text, site text, customer text, "
                "period_start text, quantity text)"
            )
            import psycopg

            with psycopg.connect(
                host="127.0.0.1", port=pg.port, user=pg.user, password=pg.password, dbname=pg.database
            ) as con:
                with con.cursor() as cur, open(path, "rb") as fh:
                    with cur.copy(
                        "COPY history (product, site, customer, period_start, quantity) FROM STDIN "
                        "WITH (FORMAT csv, HEADER true)"
                    ) as copy:
                        while block := fh.read(1 << 20):
                            copy.write(block)
                con.commit()
            print(f"# {args.lines:,} lines to {path.name} and the table in {time.perf_counter() - started:.0f} s")
            print(f"{'reader':<10} {'chunk':>9} {'rows':>11} {'wall s':>8} {'lines/s':>11} {'peak MB':>9}")
            results = []
            for reader in args.readers.split(","):
                chunk = args.lines if reader == "query-all" else args.chunk_rows
                runs = [measure(reader, pg.url(), chunk, folder) for _ in range(args.repeat)]
                r = min(runs, key=lambda x: x["seconds"])
                r["peak_mb"] = max(x["peak_mb"] for x in runs)
                shown = f"{chunk:,}" if reader.startswith("query") else "-"
                print(
                    f"{reader:<10} {shown:>9} {r['rows']:>11,} {r['seconds']:>8.1f} {r['rows'] / r['seconds']:>11,.0f} "
                    f"{r['peak_mb']:>9,.0f}",
                    flush=True,
                )
                results.append({"reader": reader, "chunk_rows": chunk, **r})
            print(json.dumps(results))
    finally:
        server.close()


if __name__ == "__main__":
    main()
