"""The memory of processes running at once: each one's tree (it and its descendants) sampled from /proc.

Used by `benchmarks/cycle_slices.py --parallel K` (slices run K at a time)
and `benchmarks/cycle_dagster.py --parallel K` (shard runs K at a time), where
one process's own peak no longer tells what the machine holds. Every
`interval` seconds a thread reads, for every watched process, the RSS and the
PSS (proportional set size, `/proc/<pid>/smaps_rollup`: a page shared by n
processes counts 1/n in each) of it and of every process below it (a
statsforecast worker pool, a spawned run), and keeps the samples.

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


def memory_mb(pid: int) -> tuple[float, float]:
    """(RSS, PSS) of one process in MB; (0, 0) when it is gone."""
    try:
        rss = int(Path(f"/proc/{pid}/statm").read_text().split()[1]) * PAGE / MB
    except (OSError, IndexError, ValueError):
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

    def __init__(self, interval: float = 0.2):
        self.watched: dict[str, int] = {}
        self.samples: list[tuple[float, dict[str, tuple[float, float]]]] = []  # (time.time(), label -> (rss, pss))
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
        taken = {}
        for label, pid in watched.items():
            figures = [memory_mb(p) for p in tree(pid, children)]
            taken[label] = (sum(f[0] for f in figures), sum(f[1] for f in figures))
        self.samples.append((now, taken))

    def _run(self, interval: float) -> None:
        while not self._stop.wait(interval):
            self.sample()

    def peak_sum_mb(self, kind: str = "rss") -> float | None:
        """The largest sum over one sample of the watched trees' RSS (`kind` "rss") or PSS ("pss")."""
        i = 0 if kind == "rss" else 1
        sums = [sum(v[i] for v in taken.values()) for _, taken in self.samples]
        return max(sums) if sums else None

    def peak_mb(self, label: str, start: float | None = None, end: float | None = None,
                kind: str = "rss") -> float | None:
        """One tree's largest sample (between `start` and `end`, time.time(), when given)."""
        i = 0 if kind == "rss" else 1
        inside = [taken[label][i] for t, taken in self.samples if label in taken
                  and (start is None or t >= start) and (end is None or t <= end)]
        return max(inside) if inside else None

    def most_at_once(self) -> int:
        """The most trees sampled at the same time."""
        return max((len(taken) for _, taken in self.samples), default=0)
