"""The history files read as they are, and the cycle date they imply (stage `raw_history` and the cycle's start).

Contract: every line of every `history*.csv|parquet` file becomes one row with
its file (`source_file`) and 1-based data row (`source_row`, the file's line
number minus the header), its five cells as text, and `read_error`: '' for a
line split into the file's columns, else why it could not be
(`too_many_fields`, `too_few_fields`, `line_too_long`, `control_characters`;
its cells then hold the line's first fields as written, cut short).
`cleaned_history` rejects those lines with that reason, so raw lines = used +
rejected holds for malformed lines too. Empty lines are skipped and counted
per file. The reader (`pipelines.engines.reader`) works in bounded memory.

History given twice is refused: two files of one name in both formats
(`history.csv` and `history.parquet`), or two files with the same bytes.
Lines repeated across files are rejected later (`duplicate_of_other_file`).

**Cycle date** (`calendar.cycle_date: latest_complete_period`): the period
after the last period of the *trusted* history (`trusted_extent`), so a lone
stray line cannot move the cycle:

1. Periods with lines are split into groups wherever more than
   `inputs.plausible.isolation_gap_years` pass without a line. A group at
   either end holding a single line, or at most 1% of the lines, is
   isolated (repeatedly, from each end).
2. At the end, a period with fewer than 10% of the median lines per period is
   dropped while the lines dropped at that end stay within the same 1% (a
   stray line a period after the last complete period).

The lines it ignores are reported (`CycleDateChoice.describe`) and, in the
cycle, rejected with their reason (`isolated_date`, `date_after_window` or
`on_or_after_cycle_date`). The thresholds (1%, 10%) are common practice, no
source.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from pipelines.calendar import ordinal_to_start, period_ordinal
from pipelines.config_inputs import InputsConfig
from pipelines.engines.history_database import load_history_query
from pipelines.engines.inputs import HISTORY_COLUMNS, HistoryFile, find_files, sha256
from pipelines.engines.plausible import gap_periods, parse_dates, trusted_extent
from pipelines.engines.reader import CHUNK_BYTES, iter_csv_text, iter_parquet_text, read_text
from pipelines.errors import InputFileError

__all__ = [
    "HISTORY_COLUMNS", "HistoryFile", "choose_cycle_date", "iter_raw_history", "latest_cycle_date", "load_raw_history"
]


def history_files(folder: Path) -> list[Path]:
    """The history files of `folder`, refusing history given twice by name or by content."""
    paths = find_files(folder, "history", many=True)
    stems: dict[str, list[str]] = {}
    for p in paths:
        stems.setdefault(p.stem, []).append(p.name)
    twice = [names for names in stems.values() if len(names) > 1]
    if twice:
        raise InputFileError(
            f"{folder}: {twice[0]} hold the same history in two formats; keep one of them (history given twice "
            f"would be counted twice)."
        )
    return paths


def load_raw_history(folder: Path, inputs: InputsConfig | None = None) -> tuple[pd.DataFrame, list[HistoryFile]]:
    """All `history*.csv|parquet` files of `folder`, stacked, with file and row of each line.

    With `inputs.history` set, the lines of its SQL query instead
    (`pipelines.engines.history_database`: source and row id in place of file
    and row); history files in `folder` beside it are refused.

    Returns the lines (every cell text, plus `read_error`) and one
    `HistoryFile` per file read. Raises InputFileError for an unreadable file,
    an unknown or missing column, bytes not in `inputs.encoding`, or history
    given twice (see the module docstring).
    """
    inputs = inputs or InputsConfig()
    if inputs.history is not None:
        present = find_files(folder, "history", many=True, required=False)
        if present:
            raise InputFileError(
                f"inputs.history reads the history from the database {inputs.history.describe()}, and the input "
                f"folder {folder} also holds history files {[p.name for p in present]}: the history would come "
                f"from two places. Move the files out of the folder, or remove inputs.history to read them."
            )
        lines, described = load_history_query(inputs.history, inputs)
        return lines, [described]
    frames, files, digests = [], [], {}
    for path in history_files(folder):
        digest = _refuse_repeated(path, digests)
        read = read_text(path, HISTORY_COLUMNS, encoding=inputs.encoding, max_line_bytes=inputs.max_line_bytes)
        lines = _file_lines(read, path.name)
        frames.append(lines)
        files.append(
            HistoryFile(
                path=path, rows=len(lines), sha256=digest, malformed=len(read.malformed), blank_lines=read.blank_lines
            )
        )
    return (frames[0] if len(frames) == 1 else pd.concat(frames, ignore_index=True)), files



def _refuse_repeated(path: Path, digests: dict[str, str]) -> str:
    """The sha256 of `path`, recorded in `digests`; InputFileError when an earlier file had the same content."""
    digest = sha256(path)
    if digest in digests:
        raise InputFileError(
            f"{path} has the same content as {digests[digest]} (sha256 {digest[:12]}...); the history would be "
            f"counted twice. Remove one of them."
        )
    digests[digest] = path.name
    return digest


def _file_lines(read, name: str) -> pd.DataFrame:
    """A file's (or a chunk's) lines as `load_raw_history` gives them: the rows read and the malformed lines in
    file order, `read_error` beside them, `source_file` first."""
    lines = read.frame  # columns added in place, no copy of the cells: the frame may hold 100+ million lines
    lines["read_error"] = ""
    if len(read.malformed):
        lines = pd.concat([lines, read.malformed[list(lines.columns)]], ignore_index=True)
        lines = lines.sort_values("source_row", kind="stable", ignore_index=True)
    lines.insert(0, "source_file", name)
    return lines


def iter_raw_history(folder: Path, inputs: InputsConfig | None = None, files: list | None = None,
                     chunk_bytes: int = CHUNK_BYTES):
    """`load_raw_history` in chunks, for a reader that needs not hold the whole history: the lines of each file
    chunk by chunk (about `chunk_bytes` of CSV; a Parquet batch of one row per 64 bytes), each chunk as
    `load_raw_history` gives those lines, in the same order (the chunks stacked are its frame). Each file's
    `HistoryFile` is appended to `files` once the file is read; the same files are refused, before their lines.
    A history query (`inputs.history`) comes as one chunk."""
    inputs = inputs or InputsConfig()
    files = [] if files is None else files
    if inputs.history is not None:
        lines, described = load_raw_history(folder, inputs)
        yield lines
        files.extend(described)
        return
    digests: dict[str, str] = {}
    for path in history_files(folder):
        digest = _refuse_repeated(path, digests)
        if path.suffix == ".parquet":
            chunks = iter_parquet_text(path, HISTORY_COLUMNS, max_line_bytes=inputs.max_line_bytes,
                                       batch_rows=max(1, chunk_bytes // 64))
        else:
            chunks = iter_csv_text(path, HISTORY_COLUMNS, encoding=inputs.encoding,
                                   max_line_bytes=inputs.max_line_bytes, chunk_bytes=chunk_bytes)
        rows = malformed = blank = 0
        for read in chunks:
            malformed, blank = malformed + len(read.malformed), blank + read.blank_lines
            lines = _file_lines(read, path.name)
            rows += len(lines)
            yield lines
        files.append(HistoryFile(path=path, rows=rows, sha256=digest, malformed=malformed, blank_lines=blank))

@dataclass(frozen=True)
class CycleDateChoice:
    """The cycle date `latest_complete_period` resolves to, and the dated lines it left aside."""

    cycle_date: pd.Timestamp | None
    last_period: pd.Timestamp | None
    lines: int  # lines with a date and a quantity inside the bounds
    ignored: pd.DataFrame = field(default_factory=pd.DataFrame)  # source_file, source_row, period_start, quantity

    def describe(self, limit: int = 5) -> str:
        if self.cycle_date is None:
            return "no history line has a usable date"
        text = (
            f"cycle date {self.cycle_date:%Y-%m-%d}: the period after {self.last_period:%Y-%m-%d}, the last period "
            f"of the history ({self.lines:,} dated lines)"
        )
        if len(self.ignored):
            shown = "; ".join(
                f"{r.source_file} row {r.source_row}: {r.period_start}" for r in self.ignored.head(limit).itertuples()
            )
            more = f" and {len(self.ignored) - limit} more" if len(self.ignored) > limit else ""
            text += (
                f"\n  {len(self.ignored)} stray line(s) after it ignored for the cycle date (cut off by a gap, or in "
                f"a period with few lines; the cycle rejects them with their reason): {shown}{more}"
            )
        return text


def choose_cycle_date(inputs: InputsConfig, period: str) -> CycleDateChoice:
    """What `calendar.cycle_date: latest_complete_period` resolves to on the history of `inputs.folder`.

    Reads every history file; lines without keys, date or a quantity inside
    `inputs.plausible.max_abs_quantity` do not count.
    """
    lines, _ = load_raw_history(inputs.folder, inputs)
    dates = parse_dates(lines["period_start"])
    qty = pd.to_numeric(lines["quantity"], errors="coerce").to_numpy(dtype=float, na_value=np.nan)
    keys = (lines[["product", "site", "customer"]] != "").all(axis=1).to_numpy()
    ok = (
        (lines["read_error"] == "").to_numpy()
        & keys
        & dates.notna().to_numpy()
        & np.isfinite(qty)
        & (np.abs(np.nan_to_num(qty, nan=np.inf)) <= inputs.plausible.max_abs_quantity)
    )
    if not ok.any():
        return CycleDateChoice(None, None, 0)
    ordinals = period_ordinal(dates[ok], period)  # a date's period, as of its period's start (naive dates)
    _, last = trusted_extent(ordinals, gap_periods(inputs.plausible.isolation_gap_years, period))
    last_start = ordinal_to_start(np.array([last]), period)[0]
    after = ordinals > last
    ignored = lines.loc[ok].loc[after, ["source_file", "source_row", "period_start", "quantity"]].reset_index(drop=True)
    next_start = ordinal_to_start(np.array([last + 1]), period)[0]
    return CycleDateChoice(pd.Timestamp(next_start), pd.Timestamp(last_start), int(ok.sum()), ignored)


def latest_cycle_date(folder: Path, period: str, inputs: InputsConfig | None = None) -> pd.Timestamp | None:
    """The period after the last trusted period of the history files (None when no line has a date).

    This is what `calendar.cycle_date: latest_complete_period` resolves to when a
    cycle is started; see `choose_cycle_date` for the lines it leaves aside.
    """
    inputs = (inputs or InputsConfig()).model_copy(update={"folder": Path(folder)})
    return choose_cycle_date(inputs, period).cycle_date
