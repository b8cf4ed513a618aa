"""The one Definitions object of apportion: every asset, check, job, schedule, sensor and resource."""

import dagster as dg

from assets.backtest_accuracy import backtest_accuracy
from assets.cleaned_history import cleaned_history
from assets.cycle_report import cycle_report
from assets.lifecycle_history import lifecycle_history
from assets.master_data import adjustments, customer_spans, pins, products, shortages
from assets.period_basis import period_basis
from assets.plan_measures import plan_measures
from assets.publication import publication_asset
from assets.raw_history import raw_history
from assets.reconciliation import reconciliation
from assets.reinitialized_target import reinitialized_target
from assets.share_drift import share_drift
from assets.share_tables import share_tables
from assets.statistical_forecast import statistical_forecast
from assets.strategy_choice import strategy_choice
from pipelines.jobs import class_step_sensor, cycle_job, cycle_schedule_for, dead_run_reaper, new_history_file_sensor
from pipelines.resources import PartitionStore, PlanningConfigResource

ASSETS = [
    raw_history,
    products,
    customer_spans,
    adjustments,
    pins,
    shortages,
    cleaned_history,
    lifecycle_history,
    share_tables,
    period_basis,
    share_drift,
    reinitialized_target,
    backtest_accuracy,
    strategy_choice,
    statistical_forecast,
    reconciliation,
    cycle_report,
    plan_measures,
]
# last: downstream of every asset above, it publishes the class's tables once their blocking checks passed
ASSETS.append(publication_asset(list(ASSETS)))


def build_definitions(config_path: str = "") -> dg.Definitions:
    """Definitions over the planning config at `config_path` ('' = $APPORTION_CONFIG or config/planning.yaml).

    The config is read here, once, for the schedule's cron (calendar.schedule); an invalid config stops the
    code location from loading with the error naming the file and key.
    """
    planning = PlanningConfigResource(path=config_path)
    calendar = planning.config.calendar
    return dg.Definitions(
        assets=ASSETS,
        jobs=[cycle_job],
        schedules=[cycle_schedule_for(calendar.schedule, calendar.period)],
        sensors=[new_history_file_sensor, class_step_sensor, dead_run_reaper],
        resources={"planning": planning, "io_manager": PartitionStore(planning=planning)},
        executor=dg.in_process_executor,
    )


@dg.definitions
def defs() -> dg.Definitions:
    """What `dagster dev -m pipelines.definitions` loads; built when loaded, not when this module is imported."""
    return build_definitions()
