"""Asset `backtest_accuracy`: rolling-origin accuracy of every strategy, and the choice for `auto` classes."""

import dagster as dg
import pandas as pd

from assets.common import partition_metadata, schema_check_spec, table_metadata, validate
from pipelines.partitions import cycle_class_partitions, partition_config
from pipelines.resources import PlanningConfigResource
from pipelines.schemas import BacktestAccuracy, StrategyChoice
from pipelines.stages.backtest import choose_strategies, run_backtest

BACKTEST_ACCURACY = "backtest_accuracy"
CHOSEN_STRATEGY_BEATS_SEASONAL_NAIVE = "chosen_strategy_beats_seasonal_naive"
CHOICE_CHECK_TEXT = (
    "Warns when a product class's strategy (the backtest's choice for `auto`, else the configured grain's) has a "
    "higher leaf-grain backtest WMAPE than seasonal naive. When it fires, the listed classes' models add no value "
    "over the benchmark: review their models, or the history the backtest saw."
)


@dg.asset(
    name=BACKTEST_ACCURACY,
    group_name="forecast",
    partitions_def=cycle_class_partitions,
    kinds={"pandas", "duckdb", "statsforecast"},
    check_specs=[
        schema_check_spec(BACKTEST_ACCURACY, BacktestAccuracy),
        dg.AssetCheckSpec(CHOSEN_STRATEGY_BEATS_SEASONAL_NAIVE, asset=BACKTEST_ACCURACY, blocking=False, description=CHOICE_CHECK_TEXT),
    ],
    description="Rolling-origin backtest per product class: WMAPE, bias, MASE and value added over seasonal naive "
    "of each strategy at leaf and parent grain; the metadata holds the strategy each class follows and its margin.",
)
def backtest_accuracy(
    context: dg.AssetExecutionContext,
    planning: PlanningConfigResource,
    lifecycle_history: pd.DataFrame,
    share_tables: pd.DataFrame,
    cycle_calendar: pd.DataFrame,
):
    config = partition_config(context, planning.config)
    cycle_date = pd.Timestamp(cycle_calendar["cycle_date"].iloc[0])
    children = share_tables[["product", "site", "customer", "product_class"]]
    result = run_backtest(lifecycle_history, children, config, cycle_date, log=context.log.info)
    table, check = validate(result.accuracy, BacktestAccuracy, BACKTEST_ACCURACY)
    choice = StrategyChoice.validate(choose_strategies(table, config))
    wide = table.pivot_table(index=["product_class", "grain", "strategy"], columns="metric", values="value").reset_index()
    yield dg.Output(
        table,
        metadata=table_metadata(
            table,
            origins=", ".join(str(o.date()) for o in result.origins),
            strategy_choice=choice,
            accuracy_by_class=wide.sort_values(["product_class", "grain", "wmape"]),
        ),
    )
    yield check
    losing = choice[~choice["beats_seasonal_naive"]]
    yield dg.AssetCheckResult(
        asset_key=BACKTEST_ACCURACY,
        check_name=CHOSEN_STRATEGY_BEATS_SEASONAL_NAIVE,
        passed=losing.empty,
        severity=dg.AssetCheckSeverity.WARN,
        metadata={
            "failing_count": dg.MetadataValue.int(len(losing)),
            "proves": dg.MetadataValue.text(CHOICE_CHECK_TEXT.split(". When")[0]),
            "strategy_choice": table_metadata(choice)["preview"],
            **({"failing_rows_sample": table_metadata(losing)["preview"]} if len(losing) else {}),
            **partition_metadata(),
        },
    )
