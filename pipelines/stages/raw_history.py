"""Stage 1, `raw_history`: the history files loaded as they are, the lines of the partition's product class.

Every line keeps its file and row, and a line the reader could not split
keeps its `read_error`; the contract and the reading rules are those of
`pipelines.engines.history_files`. With `inputs.history` the lines come from
its SQL query instead (`pipelines.engines.history_database`), each with its
source and row id in place of file and row.
"""

from __future__ import annotations

import pandas as pd

from pipelines.engines.class_rows import InputSettings, class_map, class_rows
from pipelines.engines.history_files import load_raw_history
from pipelines.results import Log, StageResult, quiet


def run(product_class_map: pd.DataFrame, settings: InputSettings, log: Log = quiet) -> StageResult:
    """The history lines of the partition's class; a line of a product in no class is kept in every class.

    cleaned_history then rejects such lines with their reason, as it does the
    lines the reader could not split (their `read_error`).
    """
    classes = class_map(product_class_map)
    lines, files = load_raw_history(settings.folder, settings.inputs)
    mine = class_rows(lines, classes, settings.product_class, shard=settings.shard)
    source = settings.inputs.history.describe() if settings.inputs.history is not None else str(settings.folder)
    log(
        f"{settings.product_class}: {len(mine)} of {len(lines)} history lines from "
        + (f"the query {source}" if settings.inputs.history is not None else f"{len(files)} file(s) in {source}")
    )
    files_table = pd.DataFrame(
        [
            {"file": f.path.name, "rows": f.rows, "malformed": f.malformed, "blank_lines": f.blank_lines,
             "sha256": f.sha256}
            for f in files
        ]
    )
    figures = {
        "input_folder": str(settings.folder),
        "history_source": source,  # the folder, or the query's source name and URL without its password
        "files": files_table,
        "lines_in_files": len(lines),
        "lines_in_no_class": int(lines["product"].map(classes).isna().sum()),
        "malformed_lines": int(sum(f.malformed for f in files)),
    }
    return StageResult(outputs={"raw_history": mine}, metadata={"raw_history": figures})
