"""Asset `raw_history`: the history files as they are."""

import dagster as dg
import pandas as pd

from assets.common import schema_check_spec, table_metadata, validate
from pipelines.resources import PlanningConfigResource
from pipelines.schemas import RawHistory
from pipelines.stages.raw_history import load_raw_history

RAW_HISTORY = "raw_history"


@dg.asset(
    name=RAW_HISTORY,
    group_name="history",
    kinds={"pandas", "duckdb"},
    check_specs=[schema_check_spec(RAW_HISTORY, RawHistory)],
    description="Every history line of the input folder's history*.csv / .parquet files, every cell as text.",
)
def raw_history(context: dg.AssetExecutionContext, planning: PlanningConfigResource):
    folder = planning.config.inputs.folder
    lines, files = load_raw_history(folder)
    lines, check = validate(lines, RawHistory, RAW_HISTORY)
    context.log.info(f"read {len(lines)} history lines from {len(files)} file(s) in {folder}")
    files_table = pd.DataFrame([{"file": f.path.name, "rows": f.rows, "sha256": f.sha256} for f in files])
    yield dg.Output(lines, metadata=table_metadata(lines, input_folder=str(folder), files=files_table))
    yield check
