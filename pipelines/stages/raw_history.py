"""Stage 1, `raw_history`: the history files loaded as they are, the lines of the partition's product class.

Every line keeps its file and row, and a line the reader could not split
keeps its `read_error`; the contract and the reading rules are those of
`pipelines.engines.history_files`. With `inputs.history` the lines come from
its SQL query instead (`pipelines.engines.history_database`), each with its
source and row id in place of file and row.
"""

from __future__ import annotations

import pandas as pd

from pipelines.engines.class_rows import InputSettings, class_map, class_rows, history_figures
from pipelines.engines.history_files import load_raw_history
from pipelines.results import Log, StageResult, quiet


def run(product_class_map: pd.DataFrame, settings: InputSettings, log: Log = quiet) -> StageResult:
    """The history lines of the partition's class; a line of a product in no class is kept in every class.

    cleaned_history then rejects such lines with their reason, as it does the
    lines the reader could not split (their `read_error`). With `settings.cut`
    the lines are the partition's part of the cycle's cut (`pipelines.input_cut`: the same rows, read once per
    cycle for every partition), else the whole history is read here and the class's rows kept.
    """
    if settings.cut is not None:
        mine, figures = settings.cut.lines(say=log)
    else:
        classes = class_map(product_class_map)
        lines, files = load_raw_history(settings.folder, settings.inputs)
        mine = class_rows(lines, classes, settings.product_class, shard=settings.shard)
        figures = history_figures(settings.inputs, files, len(lines), int(lines["product"].map(classes).isna().sum()))
    source = figures["history_source"]
    log(
        f"{settings.product_class}: {len(mine)} of {figures['lines_in_files']} history lines from "
        + (f"the query {source}" if settings.inputs.history is not None else f"{len(figures['files'])} file(s) in "
           f"{source}")
        + (" (the cycle's cut)" if settings.cut is not None else "")
    )
    figures = {**figures, "files": pd.DataFrame(figures["files"])}
    return StageResult(outputs={"raw_history": mine}, metadata={"raw_history": figures})
