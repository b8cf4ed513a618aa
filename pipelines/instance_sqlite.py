"""The command line's Dagster instance on SQLite without a disk flush per event (issue 15: a small class fast).

Dagster's SQLite storages (the default instance under DAGSTER_HOME) open a new
connection for every event stored and every query, about 3,000 for one class
of the demo, in WAL mode with SQLite's default `synchronous=FULL`. Each commit
then waits for an fsync of the WAL, and each close, being the last connection
to the file, checkpoints the WAL into the database with two more fsyncs and
deletes it: 5-15 ms of waiting per connection on this machine's disk, for
about 1 ms of cpu (benchmarks/README.md, *Small data through the command line*).

`fewer_flushes()` changes two things for the connections this process opens
while it is active, through SQLAlchemy's public `connect` event (no Dagster
internals):

- `PRAGMA synchronous=NORMAL` on each SQLite connection: in WAL mode a commit
  no longer waits for the disk. SQLite documents this as safe from corruption;
  after a power loss or an OS crash (not a crash of this process) the last
  commits before it may be missing from the history (sqlite.org/pragma.html#pragma_synchronous,
  sqlite.org/wal.html).
- one idle *keeper* connection per database file, held until the command
  ends, so the per-event connections are never the last one and their close
  neither checkpoints nor deletes the WAL; SQLite still checkpoints when the
  WAL passes 1,000 pages, and the keeper's own close at the end checkpoints
  once.

The files, their schema and every row are those of the default instance: the
UI (`dagster dev` on the same DAGSTER_HOME) and the checks' history see every
run and check as before, while the command runs and after.
"""

from __future__ import annotations

import sqlite3
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

from sqlalchemy import event
from sqlalchemy.engine import Engine


def _main_file(connection: sqlite3.Connection) -> str | None:
    """The file of the connection's main database ('' for an in-memory one)."""
    for _seq, name, file in connection.execute("PRAGMA database_list").fetchall():
        if name == "main":
            return file or None
    return None


def _keeper(file: str) -> sqlite3.Connection | None:
    """An idle connection holding the file's WAL index open, or None while the file is not in WAL mode yet."""
    if not Path(file).is_file() or Path(file).stat().st_size == 0:
        return None
    keeper = sqlite3.connect(file, check_same_thread=False, isolation_level=None)
    if keeper.execute("PRAGMA journal_mode").fetchone()[0].lower() != "wal":
        keeper.close()
        return None
    keeper.execute("SELECT count(*) FROM sqlite_master").fetchone()  # maps the WAL index: now a reader of the file
    return keeper


# open keepers at most: a run's own event file is written while the run lasts, so a long backfill closes the
# keepers of its earlier runs (each close checkpoints that file) instead of holding three descriptors per run
MAX_KEEPERS = 16


@contextmanager
def fewer_flushes() -> Iterator[dict[str, sqlite3.Connection]]:
    """While active: SQLite connections opened through SQLAlchemy commit without an fsync, and their close
    leaves the WAL to the keeper of their file (see the module docstring). Yields the keepers by file, the
    most recently opened last."""
    keepers: dict[str, sqlite3.Connection] = {}
    lock = threading.Lock()  # the progress display reads the instance from a thread of its own

    def on_connect(dbapi_connection, _record) -> None:
        if not isinstance(dbapi_connection, sqlite3.Connection):
            return  # PostgreSQL and the rest: their own settings
        dbapi_connection.execute("PRAGMA synchronous=NORMAL")
        file = _main_file(dbapi_connection)
        with lock:
            if not file or file in keepers:
                return
            keeper = _keeper(file)
            if keeper is None:
                return
            keepers[file] = keeper
            while len(keepers) > MAX_KEEPERS:
                keepers.pop(next(iter(keepers))).close()

    event.listen(Engine, "connect", on_connect)
    try:
        yield keepers
    finally:
        event.remove(Engine, "connect", on_connect)
        with lock:
            for keeper in keepers.values():
                keeper.close()
            keepers.clear()
