"""Stage 1, `raw_history`: the history files loaded as they are."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from pipelines.stages.inputs import InputFile, find_files, read_text_table, sha256

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
