"""Asset `raw_history`: the history files as they are, the lines of the partition's product class."""

import dagster as dg
import pandas as pd

from assets.common import schema_check_spec, table_metadata, validate
from assets.master_data import class_of_partition
from pipelines.partitions import cycle_class_partitions
from pipelines.resources import PlanningConfigResource
from pipelines.schemas import RawHistory
from pipelines.stages.master_data import class_rows
from pipelines.stages.raw_history import load_raw_history

RAW_HISTORY = "raw_history"


@dg.asset(
    name=RAW_HISTORY,
    group_name="history",
    partitions_def=cycle_class_partitions,
    kinds={"pandas", "duckdb"},
    check_specs=[schema_check_spec(RAW_HISTORY, RawHistory)],
    description="Every history line of the input folder's history*.csv / .parquet files for the partition's product "
    "class, every cell as text, with file and row. Lines of a product that is in no class (blank, or not in the product "
    "master) and lines the reader could not split (read_error) are kept in every class, where cleaned_history rejects "
    "them with their reason.",
)
def raw_history(context: dg.AssetExecutionContext, planning: PlanningConfigResource):
    config, product_class, classes = class_of_partition(context, planning)
    folder = config.inputs.folder
    lines, files = load_raw_history(folder, config.inputs)
    mine = class_rows(lines, classes, product_class)
    no_class = int(lines["product"].map(classes).isna().sum())
    mine, check = validate(mine, RawHistory, RAW_HISTORY)
    context.log.info(f"{product_class}: {len(mine)} of {len(lines)} history lines from {len(files)} file(s) in {folder}")
    files_table = pd.DataFrame(
        [
            {"file": f.path.name, "rows": f.rows, "malformed": f.malformed, "blank_lines": f.blank_lines, "sha256": f.sha256}
            for f in files
        ]
    )
    yield dg.Output(
        mine,
        metadata=table_metadata(
            mine,
            input_folder=str(folder),
            files=files_table,
            lines_in_files=len(lines),
            lines_in_no_class=no_class,
            malformed_lines=int(sum(f.malformed for f in files)),
        ),
    )
    yield check
