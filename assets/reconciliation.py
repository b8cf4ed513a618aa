"""Asset `reconciliation`: per parent and period, the parent forecast against the sum of its children."""

from assets.factory import StageAsset, Table, stage_asset
from pipelines.stages import reconciliation as stage

RECONCILIATION = "reconciliation"

reconciliation = stage_asset(StageAsset(
    tables=(Table(
        RECONCILIATION,
        "Per parent and period: the parent forecast as the strategy produced it, the final one, the sum of its "
        "children and the difference; its checks prove the hierarchy coherent and every active parent carried.",
    ),),
    run=stage.run,
    settings=lambda part: stage.ReconciliationSettings.of(part.config),
    group="forecast",
    ins=("parent_forecast", "statistical_forecast", "customer_spans", "products", "cycle_calendar"),
))
