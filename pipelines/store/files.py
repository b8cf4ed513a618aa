"""File operations the store is built on, and who a process is.

Everything the store needs from its storage is here, so the protocol is easy to
carry to another backend:

- `write_atomic(path, data)`: the file appears whole or not at all (a temporary
  name in the same folder, flushed to disk, then `os.replace`; on object storage
  a single PUT of the object does the same);
- `read_json`, `listdir`, `remove`: plain reads, listings and deletes;
- locks (pipelines/store/locks.py): an advisory lock on a file (`flock`; on
  object storage a conditional create such as If-None-Match with a lease).
"""

from __future__ import annotations

import json
import os
import socket
import time
from pathlib import Path

TMP_PREFIX = ".tmp-"
HOST = socket.gethostname()
HOST_TOKEN = HOST.replace(".", "_")  # the host as it appears in a temporary file's name (dots are separators there)


def process_start(pid: int) -> str | None:
    """The start time of process `pid` (clock ticks since boot, Linux /proc), None where it cannot be read.

    A pid can be reused after its process dies; the pair (pid, start) names one process.
    """
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return None
    # the command name (field 2) is in parentheses and may hold spaces: split after its closing one
    fields = stat[stat.rindex(")") + 2 :].split()
    return fields[19] if len(fields) > 19 else None


def this_process() -> dict[str, str]:
    """host, pid and pid start of the calling process."""
    pid = os.getpid()
    return {"host": HOST, "pid": str(pid), "pid_start": process_start(pid) or ""}


def process_alive(host: str, pid: str | int, pid_start: str | None = None) -> bool | None:
    """Whether that process still runs: True / False on this host, None (unknown) for another host."""
    if host != HOST:
        return None
    try:
        pid = int(pid)
    except (TypeError, ValueError):
        return None
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        pass  # it exists, owned by another user
    if pid_start:
        now = process_start(pid)
        if now is not None and now != pid_start:
            return False  # the pid was reused by another process
    return True


def tmp_name(final: str) -> str:
    """A temporary name beside `final` that says which process writes it."""
    return f"{TMP_PREFIX}{final}.{HOST_TOKEN}.{os.getpid()}.{time.monotonic_ns()}"


def tmp_writer(name: str) -> tuple[str, str] | None:
    """(host token, pid) of the process that writes temporary file `name`, None if it is not one."""
    if not name.startswith(TMP_PREFIX):
        return None
    parts = name.rsplit(".", 3)
    return (parts[1], parts[2]) if len(parts) == 4 else None


def fsync_dir(folder: Path) -> None:
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def write_atomic(path: Path, data: bytes) -> None:
    """Write `data` to `path` so that a reader sees the old file or the whole new one, never a part."""
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.parent / tmp_name(path.name)
    try:
        with open(tmp, "wb") as out:
            out.write(data)
            out.flush()
            os.fsync(out.fileno())
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    fsync_dir(path.parent)


def write_json(path: Path, record: dict) -> None:
    write_atomic(path, json.dumps(record, indent=1, sort_keys=True, default=str).encode())


def read_json(path: Path) -> dict | None:
    """The record at `path`, None when there is none."""
    try:
        return json.loads(path.read_bytes())
    except FileNotFoundError:
        return None


def stale_tmp(path: Path, max_age_seconds: float = 86400.0) -> bool:
    """Whether `path` is a temporary file left by a writer that died (or one older than a day)."""
    writer = tmp_writer(path.name)
    if writer is None:
        return False
    if writer[0] == HOST_TOKEN and process_alive(HOST, writer[1]) is False:
        return True
    try:
        return time.time() - path.stat().st_mtime > max_age_seconds
    except FileNotFoundError:
        return False
