"""Stage 1, `raw_history`: the history files loaded as they are, the lines of the partition's product class."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from pipelines.engines.class_rows import InputSettings, class_map, class_rows
from pipelines.engines.inputs import InputFile, find_files, read_text_table, sha256
from pipelines.results import Log, StageResult, quiet

HISTORY_COLUMNS = ("product", "site", "customer", "period_start", "quantity")


def load_raw_history(folder: Path) -> tuple[pd.DataFrame, list[InputFile]]:
    """All `history*.csv|parquet` files of `folder`, stacked, with file and row of each line.

    Returns the lines (every cell text) and one `InputFile` per file read.
    """
    frames, files = [], []
    for path in find_files(folder, "history", many=True):
        df = read_text_table(path, HISTORY_COLUMNS)
        df.insert(0, "source_row", np.arange(1, len(df) + 1, dtype=np.int64))
        df.insert(0, "source_file", path.name)
        frames.append(df)
        files.append(InputFile(path=path, rows=len(df), sha256=sha256(path)))
    return pd.concat(frames, ignore_index=True), files


def latest_cycle_date(folder: Path, period: str) -> pd.Timestamp | None:
    """The period after the latest dated line of the history files (None when no line has a date).

    This is what `calendar.cycle_date: latest_complete_period` resolves to when a
    cycle is started; the files are expected to hold complete periods only.
    """
    from pipelines.calendar import period_start, shift_periods

    latest = None
    for path in find_files(folder, "history", many=True):
        dates = pd.to_datetime(
            read_text_table(path, ("period_start",))["period_start"], format="ISO8601", errors="coerce"
        )
        if dates.notna().any():
            latest = dates.max() if latest is None else max(latest, dates.max())
    if latest is None:
        return None
    start = period_start(pd.Series([latest]), period).iloc[0]
    return shift_periods(pd.Timestamp(start), 1, period)


def run(product_class_map: pd.DataFrame, settings: InputSettings, log: Log = quiet) -> StageResult:
    """The history lines of the partition's class; a line of a product in no class is kept in every class.

    cleaned_history then rejects such lines with their reason.
    """
    classes = class_map(product_class_map)
    lines, files = load_raw_history(settings.folder)
    mine = class_rows(lines, classes, settings.product_class)
    log(
        f"{settings.product_class}: {len(mine)} of {len(lines)} history lines from {len(files)} file(s) in "
        f"{settings.folder}"
    )
    files_table = pd.DataFrame([{"file": f.path.name, "rows": f.rows, "sha256": f.sha256} for f in files])
    figures = {
        "input_folder": str(settings.folder),
        "files": files_table,
        "lines_in_files": len(lines),
        "lines_in_no_class": int(lines["product"].map(classes).isna().sum()),
    }
    return StageResult(outputs={"raw_history": mine}, metadata={"raw_history": figures})
