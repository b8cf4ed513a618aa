"""Asset `reconciliation`: per parent and period, the parent forecast against the sum of its children."""

from assets.factory import StageAsset, Table, stage_asset
from pipelines.stages import reconciliation as stage

RECONCILIATION = "reconciliation"

reconciliation = stage_asset(StageAsset(
    tables=(Table(
        RECONCILIATION,
        "Per parent and period: parent forecast, sum of its children, difference; its checks prove the hierarchy "
        "coherent.",
    ),),
    run=stage.run,
    settings=lambda part: None,
    group="forecast",
    ins=("parent_forecast", "statistical_forecast"),
))
