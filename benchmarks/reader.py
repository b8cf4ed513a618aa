"""Time and size the history reader on a large synthetic file and on malformed lines.

    nice -n 10 .venv/bin/python benchmarks/reader.py --lines 10000000 [--folder var/bench-reader] [--cases all]
        [--readers columnar,pandas] [--cap-gb 6] [--keep]

Writes (once, reused while `--keep`) a seeded history CSV of `--lines` lines
in the demo's format (product, site, customer, ISO date, integer quantity;
about 50 bytes a line), then reads it in a fresh child process per reader and
case, printing wall time (the fastest of `--repeat` runs: the machine is
shared), lines per second and the child's peak RSS (getrusage ru_maxrss, the
highest of the runs; the whole process: Python, pandas and the result;
imports happen before the clock starts):

    columnar   pipelines.engines.history_files.load_raw_history: the reader of
               pipelines/engines/reader.py (numpy line scan + pyarrow parse per
               32 MB chunk), the frame of text cells it returns
    pandas     the reader it replaced: pandas.read_csv(dtype=str) on the text,
               every cell stripped, row numbers added (as on main before it)

Cases:

    large      the file of --lines lines
    fields     1,000,000 good lines and one line of 100,000 fields in the middle
    cell       1,000,000 good lines and one line with a 256 MB cell in the middle

Every child runs under an address-space cap of `--cap-gb` (RLIMIT_AS), so a
reader that would grow without bound fails with MemoryError at the cap instead
of taking the machine: such a run prints `failed at the cap`. Figures go to
benchmarks/README.md.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
HEADER = b"product,site,customer,period_start,quantity\n"


def _digits(values: np.ndarray, width: int) -> np.ndarray:
    """Zero-padded decimal digits of `values` as an (n, width) uint8 array (vectorised, no per-line Python)."""
    powers = 10 ** np.arange(width - 1, -1, -1, dtype=np.int64)
    return (48 + (values[:, None] // powers) % 10).astype(np.uint8)


def write_history(path: Path, lines: int, seed: int = 7, block: int = 1_000_000) -> None:
    """`lines` history lines: 2,000 products x 3 sites x 2,000 customers, 3 years of dates, quantities 1-999.

    Fixed-width lines such as `P00042,SITE-2,C01234,2025-03-12,087` (36 bytes), built as a byte matrix.
    """
    rng = np.random.default_rng(seed)
    days = (np.datetime64("2023-12-04") + np.arange(3 * 364)).astype("S10")
    day_bytes = np.frombuffer(days.tobytes(), dtype=np.uint8).reshape(len(days), 10)
    with open(path, "wb") as fh:
        fh.write(HEADER)
        for start in range(0, lines, block):
            n = min(block, lines - start)
            row = np.empty((n, 36), dtype=np.uint8)
            row[:, 0] = ord("P")
            row[:, 1:6] = _digits(rng.integers(0, 2000, n), 5)
            row[:, 6:13] = np.frombuffer(b",SITE-0", dtype=np.uint8)
            row[:, 12] = 48 + rng.integers(1, 4, n)
            row[:, 13:15] = np.frombuffer(b",C", dtype=np.uint8)
            row[:, 15:20] = _digits(rng.integers(0, 2000, n), 5)
            row[:, 20] = ord(",")
            row[:, 21:31] = day_bytes[rng.integers(0, len(days), n)]
            row[:, 31] = ord(",")
            row[:, 32:35] = _digits(rng.integers(1, 1000, n), 3)
            row[:, 35] = ord("\n")
            fh.write(row.tobytes())


def write_malformed(path: Path, kind: str, good: int = 1_000_000) -> None:
    """`good` lines around one line of 100,000 fields (`fields`) or with a 256 MB cell (`cell`)."""
    half = good // 2
    one = b"P00001,SITE-1,C00001,2025-01-06,5\n"
    with open(path, "wb") as fh:
        fh.write(HEADER)
        fh.write(one * half)
        if kind == "fields":
            fh.write(b",".join([b"x"] * 100_000) + b"\n")
        else:
            fh.write(b"P00001,SITE-1,C00001,2025-01-06,")
            block = b"9" * (1 << 20)
            for _ in range(256):
                fh.write(block)
            fh.write(b"\n")
        fh.write(one * (good - half))


CHILD = r"""
import json, resource, sys, time
sys.path.insert(0, {root!r})
cap = int({cap_gb} * (1 << 30))
resource.setrlimit(resource.RLIMIT_AS, (cap, cap))
from pathlib import Path
reader, folder = {reader!r}, Path({folder!r})
import numpy as np, pandas as pd  # imports before the clock: only reading is timed
from pipelines.engines.history_files import load_raw_history
started = time.perf_counter()
try:
    if reader == "columnar":
        lines, files = load_raw_history(folder)
        rows, malformed = len(lines), int((lines["read_error"] != "").sum())
    else:
        frames = []
        for path in sorted(folder.glob("history*.csv")):
            df = pd.read_csv(path, dtype=str, keep_default_na=False, na_filter=False, skipinitialspace=True)
            df = df.apply(lambda s: s.str.strip())
            df.insert(0, "source_row", np.arange(1, len(df) + 1, dtype=np.int64))
            df.insert(0, "source_file", path.name)
            frames.append(df)
        lines = pd.concat(frames, ignore_index=True)
        rows, malformed = len(lines), -1
    outcome = "ok"
except MemoryError:
    rows, malformed, outcome = 0, 0, "failed at the cap (MemoryError)"
except Exception as err:
    rows, malformed, outcome = 0, 0, f"failed: {{type(err).__name__}}: {{str(err)[:200]}}"
seconds = time.perf_counter() - started
peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
print(json.dumps({{"rows": rows, "malformed": malformed, "seconds": seconds, "peak_mb": peak, "outcome": outcome}}))
"""


def measure(reader: str, folder: Path, cap_gb: float) -> dict:
    code = CHILD.format(root=str(ROOT), reader=reader, folder=str(folder), cap_gb=cap_gb)
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    if done.returncode != 0:
        tail = (done.stderr or done.stdout).strip().splitlines()[-1:] or ["?"]
        nan = float("nan")
        return {"rows": 0, "malformed": 0, "seconds": nan, "peak_mb": nan, "outcome": f"killed ({tail[0]})"}
    return json.loads(done.stdout.strip().splitlines()[-1])


def main(argv: list[str] | None = None) -> None:
    p = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--lines", type=int, default=10_000_000)
    p.add_argument("--folder", default=str(ROOT / "var" / "bench-reader"))
    p.add_argument("--cases", default="large,fields,cell")
    p.add_argument("--readers", default="columnar,pandas")
    p.add_argument("--cap-gb", type=float, default=6.0)
    p.add_argument("--keep", action="store_true", help="keep the generated files for the next run")
    p.add_argument(
        "--repeat", type=int, default=3, help="runs per reader and case; the fastest is printed (a noisy machine)"
    )
    args = p.parse_args(argv)
    base = Path(args.folder)
    results = []
    print(
        f"{'case':<8} {'reader':<9} {'rows':>11} {'malformed':>9} {'wall s':>8} {'lines/s':>11} {'peak MB':>9}  outcome"
    )
    for case in args.cases.split(","):
        folder = base / case
        folder.mkdir(parents=True, exist_ok=True)
        path = folder / "history.csv"
        if not path.exists():
            started = time.perf_counter()
            if case == "large":
                write_history(path, args.lines)
            else:
                write_malformed(path, case)
            seconds = time.perf_counter() - started
            print(f"# wrote {path} ({path.stat().st_size / 1e6:,.0f} MB) in {seconds:.0f} s", flush=True)
        for reader in args.readers.split(","):
            runs = [measure(reader, folder, args.cap_gb) for _ in range(args.repeat)]
            r = min(runs, key=lambda x: x["seconds"] if x["seconds"] == x["seconds"] else float("inf"))
            r["peak_mb"] = max(x["peak_mb"] for x in runs)
            rate = r["rows"] / r["seconds"] if r["rows"] and r["seconds"] == r["seconds"] else 0
            print(
                f"{case:<8} {reader:<9} {r['rows']:>11,} {r['malformed']:>9} {r['seconds']:>8.1f} {rate:>11,.0f} "
                f"{r['peak_mb']:>9,.0f}  {r['outcome']}",
                flush=True,
            )
            results.append({"case": case, "reader": reader, **r})
    if not args.keep:
        for case in args.cases.split(","):
            for f in (base / case).glob("history.csv"):
                os.remove(f)
    print(json.dumps(results))


if __name__ == "__main__":
    main()
