"""Reading input files (CSV or Parquet) as text, exactly as written.

Every cell is read as a string and blanks stay '' so that nothing is parsed,
guessed or dropped here; parsing and rejection happen in the stages, where
each rejected line gets a reason.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from pipelines.errors import InputFileError

SUFFIXES = (".csv", ".parquet")


@dataclass(frozen=True)
class InputFile:
    path: Path
    rows: int
    sha256: str


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


def read_text_table(path: Path, columns: tuple[str, ...], optional: tuple[str, ...] = ()) -> pd.DataFrame:
    """The file's `columns` as strings ('' for blank), in file order.

    `optional` columns may be absent from the file; an absent one is all blank.
    """
    try:
        if path.suffix == ".parquet":
            df = pd.read_parquet(path)
            df = df.astype(object).where(df.notna(), "").astype(str)
        else:
            df = pd.read_csv(path, dtype=str, keep_default_na=False, na_filter=False, skipinitialspace=True)
    except Exception as err:  # the reader's own message says what is wrong
        raise InputFileError(f"{path}: cannot be read ({type(err).__name__}: {err})") from None
    df.columns = [str(c).strip() for c in df.columns]
    missing = [c for c in columns if c not in df.columns]
    if missing:
        raise InputFileError(
            f"{path}: missing column(s) {missing}; the file has {list(df.columns)}. "
            f"Expected columns: {list(columns)}."
        )
    for c in optional:
        if c not in df.columns:
            df[c] = ""
    return df.loc[:, list(columns) + list(optional)].apply(lambda s: s.str.strip()).reset_index(drop=True)


def blanks_to_none(df: pd.DataFrame) -> pd.DataFrame:
    """Blank text cells become missing values (for master data parsed by the schema)."""
    return df.mask(df == "", None)
