"""The memory of processes running at once: each one's tree (it and its descendants) sampled from /proc.

Used by `benchmarks/cycle_slices.py --parallel K` (slices run K at a time)
and `benchmarks/cycle_dagster.py --parallel K` (shard runs K at a time), where
one process's own peak no longer tells what the machine holds. Every
`interval` seconds a thread reads, for every watched process, the RSS of it
and of every process below it (a statsforecast worker pool, a spawned run),
and keeps the samples. The PSS (proportional set size,
`/proc/<pid>/smaps_rollup`: a page shared by n processes counts 1/n in each)
is read only when the RSS sum reaches a new high or `pss_every` seconds (2 by
default) have passed since it was last read: the kernel walks every page of
a process to give it (measured: about 14 % of a core for two 5 GB slices
read every 0.2 s, time the slices being measured lost), and only its
largest sum is reported. A sample without it holds None.

- `peak_sum_mb("rss")`: the largest sum, over one sample, of the watched
  trees' RSS: what the processes running together held at most, counting a
  page two processes share (the interpreter's libraries, a forked worker's
  inherited pages) twice, so an upper bound; `"pss"` counts it once, the
  machine's share of it.
- `peak_mb(label)`: one tree's largest sample.

A sample misses what lives and dies between two samples (`interval`, 0.2 s by
default): the figures are sampled peaks, not high-water marks.
"""

from __future__ import annotations

import os
import threading
import time
from pathlib import Path

MB = 1024 * 1024
PAGE = os.sysconf("SC_PAGE_SIZE")


def children_of() -> dict[int, list[int]]:
    """ppid -> its children's pids, from /proc/<pid>/stat (a process gone meanwhile is skipped)."""
    found: dict[int, list[int]] = {}
    for entry in os.scandir("/proc"):
        if not entry.name.isdigit():
            continue
        try:
            stat = Path(entry.path, "stat").read_text()
        except OSError:
            continue
        ppid = int(stat[stat.rindex(")") + 2:].split()[1])  # the name in (...) may hold spaces
        found.setdefault(ppid, []).append(int(entry.name))
    return found


def tree(pid: int, children: dict[int, list[int]]) -> list[int]:
    """`pid` and every process below it."""
    out, todo = [], [pid]
    while todo:
        p = todo.pop()
        out.append(p)
        todo.extend(children.get(p, []))
    return out


def rss_mb(pid: int) -> float:
    """RSS of one process in MB (`/proc/<pid>/statm`, cheap); 0 when it is gone."""
    try:
        return int(Path(f"/proc/{pid}/statm").read_text().split()[1]) * PAGE / MB
    except (OSError, IndexError, ValueError):
        return 0.0


def memory_mb(pid: int) -> tuple[float, float]:
    """(RSS, PSS) of one process in MB; (0, 0) when it is gone."""
    rss = rss_mb(pid)
    if rss == 0.0:
        return 0.0, 0.0
    pss = 0.0
    try:
        for line in Path(f"/proc/{pid}/smaps_rollup").read_text().splitlines():
            if line.startswith("Pss:"):
                pss = int(line.split()[1]) * 1024 / MB
                break
    except (OSError, IndexError, ValueError):
        pss = rss
    return rss, pss


class TreeSampler:
    """Samples the memory of the watched process trees (label -> pid) every `interval` seconds in a thread."""

    def __init__(self, interval: float = 0.2, pss_every: float = 2.0):
        self.watched: dict[str, int] = {}
        # (time.time(), label -> (rss, pss)); pss None where this sample did not read it
        self.samples: list[tuple[float, dict[str, tuple[float, float | None]]]] = []
        self.pss_every, self._pss_at, self._rss_high = pss_every, float("-inf"), 0.0
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, args=(interval,), daemon=True)
        self._thread.start()

    def watch(self, label: str, pid: int) -> None:
        with self._lock:
            self.watched[label] = pid

    def forget(self, label: str) -> None:
        with self._lock:
            self.watched.pop(label, None)

    def stop(self) -> None:
        self._stop.set()
        self._thread.join()

    def sample(self) -> None:
        with self._lock:
            watched = dict(self.watched)
        if not watched:
            return
        children, now = children_of(), time.time()
        trees = {label: tree(pid, children) for label, pid in watched.items()}
        rss = {label: sum(rss_mb(p) for p in pids) for label, pids in trees.items()}
        high = sum(rss.values())
        if high > self._rss_high or now - self._pss_at >= self.pss_every:
            self._rss_high, self._pss_at = max(high, self._rss_high), now
            pss = {label: sum(memory_mb(p)[1] for p in pids) for label, pids in trees.items()}
        else:
            pss = dict.fromkeys(trees)
        self.samples.append((now, {label: (rss[label], pss[label]) for label in trees}))

    def _run(self, interval: float) -> None:
        while not self._stop.wait(interval):
            self.sample()

    def peak_sum_mb(self, kind: str = "rss") -> float | None:
        """The largest sum over one sample of the watched trees' RSS (`kind` "rss") or PSS ("pss"; over the samples
        that read it)."""
        i = 0 if kind == "rss" else 1
        sums = [sum(v[i] for v in taken.values()) for _, taken in self.samples
                if all(v[i] is not None for v in taken.values())]
        return max(sums) if sums else None

    def peak_mb(self, label: str, start: float | None = None, end: float | None = None,
                kind: str = "rss") -> float | None:
        """One tree's largest sample (between `start` and `end`, time.time(), when given)."""
        i = 0 if kind == "rss" else 1
        inside = [taken[label][i] for t, taken in self.samples if label in taken and taken[label][i] is not None
                  and (start is None or t >= start) and (end is None or t <= end)]
        return max(inside) if inside else None

    def most_at_once(self) -> int:
        """The most trees sampled at the same time."""
        return max((len(taken) for _, taken in self.samples), default=0)
