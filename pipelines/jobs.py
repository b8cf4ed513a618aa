"""The weekly cycle job and its schedule."""

import dagster as dg

WEEKLY_CYCLE = "weekly_cycle"

weekly_cycle_job = dg.define_asset_job(
    WEEKLY_CYCLE,
    selection=dg.AssetSelection.all(),
    description="The whole weekly cycle: history in, shares refreshed, forecast rerun and split, reconciliation proven.",
)

weekly_cycle_schedule = dg.ScheduleDefinition(
    name="weekly_cycle_monday_0600_utc",
    job=weekly_cycle_job,
    cron_schedule="0 6 * * 1",
    execution_timezone="UTC",
    default_status=dg.DefaultScheduleStatus.STOPPED,
    description="Runs the weekly cycle every Monday at 06:00 UTC (stopped until the platform team starts it).",
)
