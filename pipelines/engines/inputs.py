"""Reading input files (CSV or Parquet) as text, exactly as written.

Every cell is read as a string and blanks stay '' so that nothing is parsed,
guessed or dropped here; parsing and rejection happen in the stages, where
each rejected line gets a reason. The columnar reader itself is
`pipelines.engines.reader`.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from pipelines.engines.reader import DEFAULT_MAX_LINE_BYTES, read_text
from pipelines.errors import InputFileError

SUFFIXES = (".csv", ".parquet")


@dataclass(frozen=True)
class InputFile:
    path: Path
    rows: int
    sha256: str


HISTORY_COLUMNS = ("product", "site", "customer", "period_start", "quantity")


@dataclass(frozen=True)
class HistoryFile(InputFile):
    """One history source read (a file, or the database query): its rows, malformed and empty lines, checksum."""

    malformed: int = 0
    blank_lines: int = 0


def find_files(folder: Path, name: str, *, many: bool = False, required: bool = True) -> list[Path]:
    """Files called `name.csv` / `name.parquet` (or `name*.csv` etc. when `many`)."""
    folder = Path(folder)
    if not folder.is_dir():
        raise InputFileError(
            f"input folder {folder} does not exist; set inputs.folder in the planning config "
            f"to the folder holding {name}.csv"
        )
    pattern = f"{name}*" if many else f"{name}.*"
    found = sorted(p for p in folder.glob(pattern) if p.suffix in SUFFIXES and (many or p.stem == name))
    if not found and required:
        raise InputFileError(
            f"no {name} file in {folder}: expected {name}.csv or {name}.parquet"
            + (f" (or several {name}*.csv files)" if many else "")
        )
    if len(found) > 1 and not many:
        raise InputFileError(f"both {[p.name for p in found]} exist in {folder}; keep one of them")
    return found


def sha256(path: Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def read_text_table(
    path: Path,
    columns: tuple[str, ...],
    optional: tuple[str, ...] = (),
    *,
    encoding: str = "utf-8",
    max_line_bytes: int = DEFAULT_MAX_LINE_BYTES,
) -> pd.DataFrame:
    """The file's `columns` (and `optional` ones, blank when absent) as text, '' for blank, in file order.

    The index is `source_row`, the 1-based data row of each line (the file's
    line number minus the header line), so a failing row can be named. A
    malformed line (wrong number of fields, too long, a control character) is
    an `InputFileError` naming the file, its lines and what to do: master data
    are not quarantined line by line.
    """
    read = read_text(Path(path), columns, optional, encoding=encoding, max_line_bytes=max_line_bytes)
    if len(read.malformed):
        raise InputFileError(malformed_message(Path(path), read.malformed, len(read.columns)))
    return read.frame.set_index("source_row")


def malformed_message(path: Path, malformed: pd.DataFrame, fields: int, limit: int = 5) -> str:
    """What is wrong with the first `limit` malformed lines of `path`, and what to do."""
    what = {
        "too_many_fields": f"more than the header's {fields} fields (a comma inside a cell must be in double quotes)",
        "too_few_fields": f"fewer than the header's {fields} fields",
        "line_too_long": "longer than inputs.max_line_bytes",
        "control_characters": "a control character (a byte below 0x20 other than tab, or a lone carriage return)",
    }
    lines = [
        f"  row {r.source_row} (line {r.source_row + 1}): {r.read_error}: {what.get(r.read_error, r.read_error)}"
        for r in malformed.head(limit).itertuples()
    ]
    more = f"\n  ... and {len(malformed) - limit} more" if len(malformed) > limit else ""
    listed = "\n".join(lines)
    return f"{path}: {len(malformed)} malformed line(s):\n{listed}{more}\nCorrect these lines and run again."


def blanks_to_none(df: pd.DataFrame) -> pd.DataFrame:
    """Blank text cells become missing values (for master data parsed by the schema)."""
    return df.mask(df == "", None)
