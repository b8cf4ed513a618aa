"""The rows of one product class (of one shard of it): what every input asset of a partition keeps."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pandas as pd

from pipelines.config_inputs import InputsConfig
from pipelines.shards import Shard


@dataclass(frozen=True)
class InputSettings:
    """Where the input files are and how they are read, the partition's class, every configured class (to refuse
    unknown ones) and the config's measures (that adjustments and pins may name); the partition's shard (None:
    the class is not cut); `cut`: where its history lines were cut once for the cycle (None: read the
    whole history and keep its rows)."""

    folder: Path
    product_class: str
    known_classes: tuple[str, ...] = ()
    source: str = "<memory>"
    inputs: InputsConfig = InputsConfig()
    measures: tuple[str, ...] = ()
    shard: Shard | None = None
    cut: Any = None  # the partition's part of the cycle's history cut (pipelines.input_cut.CutPart); None: read all


def input_files(files) -> pd.DataFrame:
    """The files read: path, rows and checksum of each (for the metadata)."""
    return pd.DataFrame([{"file": str(f.path), "rows": f.rows, "sha256": f.sha256} for f in files])


def class_map(products_master: pd.DataFrame) -> pd.Series:
    """product -> product class of a product master table (`product_class_map`)."""
    return products_master.drop_duplicates("product").set_index("product")["product_class"]


def shard_rows(frame: pd.DataFrame, shard: Shard | None) -> pd.DataFrame:
    """The rows of `shard` (all of them without a shard, or when the frame lacks a column the shard hashes, such
    as the product master under a product x site hash). The index is kept."""
    if shard is None or not all(c in frame.columns for c in shard.by):
        return frame
    return frame.loc[shard.rows(frame)]


def class_rows(
    frame: pd.DataFrame, classes: pd.Series, product_class: str, keep_index: bool = False, shard: Shard | None = None
) -> pd.DataFrame:
    """The rows of `frame` whose product is in `product_class` (`classes`: product -> class of the master file).

    A row whose product is not in the master belongs to no class and is kept in
    every class (of a sharded class: in the shard its key hashes to), so the stage's schema or rule checks
    report it instead of it vanishing. `keep_index` keeps the frame's index (the file rows of master
    data, `source_row`), so a failing row can still be named.
    """
    cls = frame["product"].map(classes)
    rows = shard_rows(frame.loc[(cls == product_class) | cls.isna()], shard)
    return rows if keep_index else rows.reset_index(drop=True)


def history_figures(inputs: InputsConfig, files, lines: int, no_class: int) -> dict:
    """What `raw_history` tells of the history read (JSON-able; `files` a list of records): its source, the files
    with their rows, malformed and blank lines and checksum, the lines in all and those of a product in no class."""
    return {
        "input_folder": str(inputs.folder),
        "history_source": inputs.history.describe() if inputs.history is not None else str(inputs.folder),
        "files": [
            {"file": f.path.name, "rows": f.rows, "malformed": f.malformed, "blank_lines": f.blank_lines,
             "sha256": f.sha256}
            for f in files
        ],
        "lines_in_files": int(lines),
        "lines_in_no_class": int(no_class),
        "malformed_lines": int(sum(f.malformed for f in files)),
    }
