"""Shards marked pending: a class cut into shards is recorded complete only when every shard's versions are new.

A rerun of a cycle rewrites a sharded class shard by shard. Each shard's old
versions stay proven until that shard's run writes new ones, so without a
mark the first shard to finish would see the others' old versions proven and
record the class complete with a mix of old and new shards. The marks:

    catalog/cycle=<c>/pending/class=<k>/shard=<s>.json   {state: pending | proven, run_id, command, since}

- `mark_pending`: the command line (and the schedule, the sensor) marks every
  shard it is about to run before it starts any; each shard's run marks its
  own shard again when it starts (the IO manager), so a run started from the
  UI counts as well.
- `settle_shard`: the shard's `publication`, once its own versions are
  proven, sets its mark `proven` by its run and, under the same hold of the
  publication lock, says which other shards the class still waits for: a
  shard marked pending, or with a run queued or under way in the Dagster
  instance that has not proven it (`active_runs`, given by the caller). Since
  every shard settles under that lock, the last one sees no other pending and
  records the class complete; two finishing together cannot both wait.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

from pipelines.store.files import read_json, write_json
from pipelines.store.layout import DEFAULT_SHARD, dir_part, utc_now

PENDING = "pending"
PROVEN = "proven"


def mark_path(store, cycle: str, product_class: str, shard: str) -> Path:
    folder = store.cycle_dir(cycle) / "pending" / dir_part("class", product_class)
    return folder / f"{dir_part('shard', shard)}.json"


def mark_pending(store, cycle: str, shards: list[tuple[str, str]], *, command: str, run_id: str = "") -> None:
    """Mark each (class, store shard) of `shards` pending (a class not cut, shard `0`, needs no mark)."""
    cut = [(k, s) for k, s in shards if s != DEFAULT_SHARD]
    if not cut:
        return
    with store._publish_lock():
        for k, s in cut:
            write_json(mark_path(store, cycle, k, s),
                       {"state": PENDING, "command": command, "run_id": run_id, "since": utc_now()})


def shard_mark(store, cycle: str, product_class: str, shard: str) -> dict | None:
    return read_json(mark_path(store, cycle, product_class, shard))


def settle_shard(
    store,
    cycle: str,
    product_class: str,
    shard: str,
    run_id: str,
    others: list[str],
    active_runs: Callable[[str], list[str]] = lambda shard: [],
) -> list[str]:
    """Mark `shard` proven by `run_id`; the shards of `others` the class still waits for (see the module doc).

    `active_runs(s)`: the ids of runs of shard `s` queued, starting or started (the Dagster instance's)."""
    with store._publish_lock():
        write_json(mark_path(store, cycle, product_class, shard),
                   {"state": PROVEN, "command": "publication", "run_id": run_id, "since": utc_now()})
        waiting = []
        for s in others:
            mark = shard_mark(store, cycle, product_class, s) or {}
            proven_by = mark.get("run_id") if mark.get("state") == PROVEN else None
            if mark.get("state") == PENDING or any(r not in (run_id, proven_by) for r in active_runs(s)):
                waiting.append(s)
        return waiting
