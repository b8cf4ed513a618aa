"""A throwaway PostgreSQL server for the tests, from Debian's `postgresql` package: initdb + pg_ctl in a temp folder.

The server listens on 127.0.0.1 on a free port, with password (SCRAM)
authentication for TCP connections and its socket in its own folder, and is
stopped and deleted afterwards. PostgreSQL refuses to run as root, so as root
it runs as the `postgres` user the package creates (else `nobody`) through
`runuser`, in a folder that user owns.

Where the binaries are absent the tests that need it are skipped, except when
APPORTION_REQUIRE_POSTGRES is set (`.ci/run` sets it after installing the
package): there they fail, so CI never passes without running them.
"""

from __future__ import annotations

import glob
import os
import pwd
import shutil
import socket
import subprocess
import tempfile
from dataclasses import dataclass
from pathlib import Path

import pytest

REQUIRE = "APPORTION_REQUIRE_POSTGRES"
USER = "apportion"
PASSWORD = "s3cret-Pg-pw"  # the test's own throwaway server


@dataclass(frozen=True)
class Server:
    port: int
    user: str = USER
    password: str = PASSWORD
    database: str = "postgres"

    def url(self, password: bool = True, driver: str = "psycopg") -> str:
        auth = f"{self.user}:{self.password}" if password else self.user
        return f"postgresql+{driver}://{auth}@127.0.0.1:{self.port}/{self.database}?connect_timeout=10"

    def execute(self, *statements: str, rows: list[tuple] | None = None) -> None:
        """Run SQL statements (the last one with `rows` as executemany) as the server's superuser."""
        import psycopg

        with psycopg.connect(
            host="127.0.0.1", port=self.port, user=self.user, password=self.password, dbname=self.database
        ) as con:
            with con.cursor() as cur:
                for i, statement in enumerate(statements):
                    if rows is not None and i == len(statements) - 1:
                        cur.executemany(statement, rows)
                    else:
                        cur.execute(statement)
            con.commit()


def binaries() -> Path | None:
    """The folder of initdb and pg_ctl: on PATH, else the newest /usr/lib/postgresql/<v>/bin."""
    found = shutil.which("pg_ctl")
    if found and shutil.which("initdb"):
        return Path(os.path.realpath(found)).parent
    versions = sorted(glob.glob("/usr/lib/postgresql/*/bin/pg_ctl"), key=lambda p: int(Path(p).parts[-3]))
    return Path(versions[-1]).parent if versions else None


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _runner() -> tuple[list[str], int | None, int | None]:
    """The command prefix to run the server's programs, and the uid/gid to own its folder (None: ourselves)."""
    if os.geteuid() != 0:
        return [], None, None
    for name in ("postgres", "nobody"):
        try:
            entry = pwd.getpwnam(name)
        except KeyError:
            continue
        return ["runuser", "-u", name, "--"], entry.pw_uid, entry.pw_gid
    pytest.fail("running as root and neither a postgres nor a nobody user exists to run PostgreSQL as")


def start_server():
    """Start a server; yields a Server and stops and deletes it afterwards (a generator for a fixture)."""
    bin_dir = binaries()
    if bin_dir is None:
        if os.environ.get(REQUIRE):
            pytest.fail(f"{REQUIRE} is set but PostgreSQL's initdb and pg_ctl are not installed"
                        " (apt-get install postgresql)")
        pytest.skip("PostgreSQL's server binaries are not installed (Debian: apt-get install postgresql)")
    prefix, uid, gid = _runner()
    root = Path(tempfile.mkdtemp(prefix="apportion-pg-"))
    data, log, pwfile = root / "data", root / "server.log", root / "pw"
    pwfile.write_text(PASSWORD + "\n")
    if uid is not None:
        for path in (root, pwfile):
            os.chown(path, uid, gid)

    def run(*args: str) -> subprocess.CompletedProcess:
        return subprocess.run(prefix + list(args), capture_output=True, text=True, timeout=120)

    port = _free_port()
    started = False
    try:
        init = run(
            str(bin_dir / "initdb"), "-D", str(data), "-U", USER, f"--pwfile={pwfile}", "-E", "UTF8",
            "--locale=C", "--auth-local=trust", "--auth-host=scram-sha-256",
        )
        assert init.returncode == 0, f"initdb failed:\n{init.stdout}\n{init.stderr}"
        options = f"-p {port} -k {root} -c listen_addresses=127.0.0.1 -c fsync=off"
        start = run(str(bin_dir / "pg_ctl"), "-D", str(data), "-o", options, "-l", str(log), "-w", "-t", "60", "start")
        log_text = log.read_text() if log.exists() else ""
        assert start.returncode == 0, f"pg_ctl start failed:\n{start.stdout}\n{start.stderr}\n{log_text}"
        started = True
        yield Server(port)
    finally:
        if started:
            run(str(bin_dir / "pg_ctl"), "-D", str(data), "-m", "fast", "-w", "stop")
        shutil.rmtree(root, ignore_errors=True)
