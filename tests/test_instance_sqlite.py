"""The command line's SQLite instance without an fsync per event (pipelines/instance_sqlite.py).

What SQLite documents (sqlite.org/pragma.html#pragma_synchronous, sqlite.org/wal.html): `synchronous` is
per connection (2 = FULL, the default; 1 = NORMAL); in WAL mode the close of the last connection to a
database checkpoints the WAL and deletes the `-wal` file, while a close that is not the last one leaves it.
"""

from __future__ import annotations

import sqlite3
from contextlib import closing
from pathlib import Path

import dagster as dg
import sqlalchemy as sa
from sqlalchemy.pool import NullPool

from pipelines import instance_sqlite
from pipelines.instance_sqlite import fewer_flushes


def _wal_file(tmp_path: Path, name: str = "events.db") -> Path:
    path = tmp_path / name
    # closed here, not when collected: a `with` on a sqlite3 connection only commits, and a connection still
    # open elsewhere keeps the WAL the test looks for
    with closing(sqlite3.connect(path)) as setup, setup:
        setup.execute("PRAGMA journal_mode=WAL")
        setup.execute("CREATE TABLE event (n INTEGER)")
    return path


def _write_once(path: Path) -> int:
    """One connection as Dagster's SQLite storage opens them (a new engine, NullPool): insert, commit, close;
    its `synchronous` setting."""
    engine = sa.create_engine(f"sqlite:///{path}", poolclass=NullPool)
    with engine.connect() as connection, connection.begin():
        connection.execute(sa.text("INSERT INTO event VALUES (1)"))
        level = connection.execute(sa.text("PRAGMA synchronous")).scalar()
    engine.dispose()
    return level


def test_inside_connections_commit_without_fsync_and_leave_the_wal_to_the_keeper(tmp_path):
    path = _wal_file(tmp_path)
    wal = Path(f"{path}-wal")
    assert _write_once(path) == 2  # outside: SQLite's default FULL, and the close deletes the WAL
    assert not wal.exists()
    with fewer_flushes() as keepers:
        assert _write_once(path) == 1  # NORMAL
        assert str(path) in keepers
        assert _write_once(path) == 1
        assert wal.exists()  # the close was not the last one: no checkpoint, no delete
    assert keepers == {}  # the keeper closed at the end: the WAL checkpointed into the file
    assert not wal.exists()
    assert _write_once(path) == 2  # the listener is gone
    with closing(sqlite3.connect(path)) as check:
        assert check.execute("SELECT count(*) FROM event").fetchone()[0] == 4


def test_at_most_max_keepers_stay_open_the_oldest_closed_first(tmp_path, monkeypatch):
    # a backfill writes one event file per run: the keepers of the earliest files are closed as new ones come
    monkeypatch.setattr(instance_sqlite, "MAX_KEEPERS", 3)
    files = [_wal_file(tmp_path, f"run{i}.db") for i in range(5)]
    with fewer_flushes() as keepers:
        for path in files:
            _write_once(path)
        assert list(keepers) == [str(p) for p in files[2:]]
        assert [Path(f"{p}-wal").exists() for p in files] == [False, False, True, True, True]
    assert not any(Path(f"{p}-wal").exists() for p in files)


def test_a_dagster_run_inside_is_in_the_instance_after_it(tmp_path):
    # the UI and the checks' history read the instance's files: every event must be there once the command ended
    @dg.asset(check_specs=[dg.AssetCheckSpec("positive", asset="numbers")])
    def numbers():
        yield dg.Output([1, 2])
        yield dg.AssetCheckResult(passed=True)

    home = tmp_path / "dagster_home"
    home.mkdir()
    with fewer_flushes() as keepers:
        with dg.instance_for_test(temp_dir=str(home)) as instance:
            result = dg.materialize([numbers], instance=instance)
            assert result.success
            run_id = result.run_id
        assert keepers  # the instance's files were opened through SQLAlchemy and kept
    reopened = dg.DagsterInstance.from_config(str(home))
    events = reopened.all_logs(run_id)
    assert any(e.dagster_event_type == dg.DagsterEventType.ASSET_CHECK_EVALUATION for e in events)
    assert any(e.dagster_event_type == dg.DagsterEventType.RUN_SUCCESS for e in events)
    assert not list(home.rglob("*.db-wal"))  # every WAL checkpointed back into its file
