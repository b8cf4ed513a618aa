"""Asset `raw_history`: the history files as they are, the lines of the partition's product class."""

from assets.factory import StageAsset, Table, stage_asset
from assets.master_data import PRODUCT_CLASS_MAP, input_settings
from pipelines.stages import raw_history as stage

RAW_HISTORY = "raw_history"

raw_history = stage_asset(StageAsset(
    tables=(Table(
        RAW_HISTORY,
        "Every history line of the input folder's history*.csv / .parquet files for the partition's product "
        "class, every cell as text, with file and row. Lines of a product that is in no class (blank, or not in the "
        "product master) and lines the reader could not split (read_error) are kept in every class, where "
        "cleaned_history rejects them with their reason.",
    ),),
    run=stage.run,
    settings=input_settings,
    group="history",
    ins=(PRODUCT_CLASS_MAP,),
))
