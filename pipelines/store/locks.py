"""Advisory locks with an owner record: one writer per partition, one publisher at a time.

A lock is a file under `<store>/locks/`. The holder takes an exclusive `flock`
on it and writes who it is into it (run, command, cycle, class, host, pid,
since). The kernel drops the `flock` when the holder's process dies, however it
dies (`kill -9` too), so a dead writer never blocks the next one; the owner
record it leaves behind tells the next holder whose lock it broke, and that is
said in a message. A process that already holds a lock takes it again at once
(the command line holds a partition's lock around the run it starts in the same
process).

On a shared filesystem `flock` needs the filesystem's lock manager (NFSv4,
CephFS, Lustre mounted with `flock`); on object storage the same protocol needs
a conditional create (If-None-Match / generation match) of the lock object with
a lease the holder renews (see README "Larger than one machine").
"""

from __future__ import annotations

import datetime as dt
import fcntl
import json
import os
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

from pipelines.errors import PlanningError
from pipelines.store.files import process_alive, this_process

POLL_SECONDS = 0.5
REMIND_SECONDS = 30.0


class LockBusy(PlanningError):
    """Another live process holds the lock; `holder` is its owner record."""

    def __init__(self, message: str, holder: dict | None):
        super().__init__(message)
        self.holder = holder or {}


@dataclass
class HeldLock:
    path: Path
    fd: int
    owner: dict
    depth: int = 1
    broke: dict | None = field(default=None)


_HELD: dict[str, HeldLock] = {}


def describe(owner: dict | None) -> str:
    """Who holds (or held) a lock, in words: run X (command, pid N on host, since time)."""
    if not owner:
        return "another process (it has not written its name yet)"
    details = [owner.get("command") or "", f"pid {owner.get('pid', '?')} on {owner.get('host', '?')}"]
    if owner.get("since"):
        details.append(f"since {owner['since']}")
    who = f"run {owner['run_id']}" if owner.get("run_id") else "a process"
    return f"{who} ({', '.join(d for d in details if d)})"


def read_owner(path: Path) -> dict | None:
    try:
        text = path.read_text()
    except FileNotFoundError:
        return None
    try:
        return json.loads(text) if text.strip() else None
    except json.JSONDecodeError:
        return None  # being written right now


def _try_flock(fd: int) -> bool:
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        return True
    except BlockingIOError:
        return False


def acquire(
    path: Path,
    owner: dict,
    *,
    what: str,
    wait_seconds: float | None = None,
    on_wait: Callable[[str], None] | None = None,
    on_stale: Callable[[str], None] | None = None,
) -> HeldLock:
    """Take the lock at `path` for `owner` (run_id, command, ... ; host, pid and time are added).

    `wait_seconds`: None waits as long as it takes, 0 does not wait; when the
    lock is busy past it, raises LockBusy naming the holder. `on_wait` gets a
    message when waiting starts and every 30 s; `on_stale` one when the lock of
    a dead holder is broken. `what` names the lock in messages.
    """
    key = str(path)
    held = _HELD.get(key)
    if held is not None:
        held.depth += 1
        return held
    path.parent.mkdir(parents=True, exist_ok=True)
    fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
    started = time.monotonic()
    reminded = None
    try:
        while not _try_flock(fd):
            holder = read_owner(path)
            waited = time.monotonic() - started
            if wait_seconds is not None and waited >= wait_seconds:
                hint = "" if wait_seconds == 0 else f" after waiting {waited:.0f} s"
                raise LockBusy(f"{what} is being written by {describe(holder)}{hint}", holder)
            if on_wait and (reminded is None or time.monotonic() - reminded >= REMIND_SECONDS):
                on_wait(
                    f"{what} is being written by {describe(holder)}; waiting in the queue for it"
                    + (f" ({waited:.0f} s so far)" if reminded else "")
                )
                reminded = time.monotonic()
            time.sleep(POLL_SECONDS)
    except BaseException:
        os.close(fd)
        raise
    previous = read_owner(path)
    record = {**owner, **this_process(), "since": dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds")}
    data = (json.dumps(record, sort_keys=True) + "\n").encode()
    os.ftruncate(fd, 0)
    os.pwrite(fd, data, 0)
    os.fsync(fd)
    lock = HeldLock(path=path, fd=fd, owner=record)
    if previous:
        # the previous holder's process ended without releasing (killed): the kernel dropped its flock
        alive = process_alive(previous.get("host", ""), previous.get("pid", ""), previous.get("pid_start"))
        state = "is no longer running" if alive is False else "ended without releasing it"
        lock.broke = previous
        if on_stale:
            on_stale(f"{what}: broke the stale lock of {describe(previous)}, whose process {state}")
    _HELD[key] = lock
    return lock


def release(lock: HeldLock) -> None:
    lock.depth -= 1
    if lock.depth > 0:
        return
    _HELD.pop(str(lock.path), None)
    try:
        os.ftruncate(lock.fd, 0)
        fcntl.flock(lock.fd, fcntl.LOCK_UN)
    finally:
        os.close(lock.fd)


def holder(path: Path) -> dict | None:
    """The owner record of a lock held right now by a live process (None when free)."""
    if str(path) in _HELD:
        return _HELD[str(path)].owner
    if not path.exists():
        return None
    fd = os.open(path, os.O_RDONLY)
    try:
        if _try_flock(fd):
            fcntl.flock(fd, fcntl.LOCK_UN)
            return None
    finally:
        os.close(fd)
    return read_owner(path) or {}
