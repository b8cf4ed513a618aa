"""The cycle benchmark's scenario written once as Parquet and read back: a large run does not generate it again.

`cached(n_leaves, seed, periods, horizon, folder)` looks for the scenario in
`folder/<key>/`, where the key holds the leaves, seed, periods, horizon and a
digest of the generator's own source (`cycle_scenario.py`, `cycle_inputs.py`),
so a changed generator never reuses old files. Missing, it calls `generate`
and writes `raw_history.parquet` (the lines, text columns as written, with
file and row), one Parquet file per master table and `facts.json`, each under
a temporary name renamed into place (a killed run leaves no half scenario).
Read back, the tables are those the generator returned, cell for cell (text
as Python strings shared per distinct value, as pyarrow's `to_pandas`
deduplicates them; None where the generator had None).
"""

from __future__ import annotations

import hashlib
import json
import os
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
from cycle_scenario import Scenario, generate

HERE = Path(__file__).resolve().parent
TABLES = ("products", "spans", "shortages", "adjustments", "pins")


def scenario_key(n_leaves: int, seed: int, periods: int, horizon: int) -> str:
    """The folder name of a scenario: its parameters and the generator's source digest."""
    digest = hashlib.sha256()
    for name in ("cycle_scenario.py", "cycle_inputs.py"):
        digest.update((HERE / name).read_bytes())
    return f"leaves{n_leaves}-seed{seed}-periods{periods}-horizon{horizon}-{digest.hexdigest()[:12]}"


def cached(n_leaves: int, seed: int, periods: int, horizon: int, folder: Path) -> tuple[Scenario, bool]:
    """The scenario from `folder` if written before, else generated and written there. (scenario, was it read)."""
    where = Path(folder) / scenario_key(n_leaves, seed, periods, horizon)
    if (where / "facts.json").exists():
        return _read(where), True
    scen = generate(n_leaves, seed, periods, None, horizon)
    _write(scen, where)
    return scen, False


def scenario_maker(args, csv_folder: Path | None):
    """The benchmark's step label and scenario maker: read or written through the cache with `--scenario-cache`
    (not with `--csv`, whose lines go to CSV files), else generated."""
    if args.scenario_cache and csv_folder is None:
        folder = Path(args.scenario_cache)
        return "scenario, cached (not timed)", lambda: cached(
            args.leaves, args.seed, args.periods, args.horizon, folder
        )[0]
    return "generate (not timed)", lambda: generate(args.leaves, args.seed, args.periods, csv_folder, args.horizon)


def _write(scen: Scenario, where: Path) -> None:
    where.mkdir(parents=True, exist_ok=True)
    frames = {"raw_history": scen.raw} | {name: getattr(scen, name) for name in TABLES}
    for name, frame in frames.items():
        tmp = where / f".{name}.parquet.tmp"
        pq.write_table(pa.Table.from_pandas(frame, preserve_index=False), tmp, row_group_size=1_000_000)
        os.replace(tmp, where / f"{name}.parquet")
    tmp = where / ".facts.json.tmp"
    tmp.write_text(json.dumps({"lines": scen.lines, "facts": scen.facts}, indent=1))
    os.replace(tmp, where / "facts.json")  # last: its presence says the scenario is whole


def _read(where: Path) -> Scenario:
    def table(name: str):
        return pq.read_table(where / f"{name}.parquet").to_pandas(deduplicate_objects=True)

    meta = json.loads((where / "facts.json").read_text())
    return Scenario(
        raw=table("raw_history"),
        folder=None,
        lines=meta["lines"],
        **{name: table(name) for name in TABLES},
        facts=meta["facts"],
    )
