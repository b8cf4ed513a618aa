"""Every table of the cycle and its pandera model: the assets are named like their tables."""

from pipelines import schemas as s
from pipelines import schemas_forecast as f
from pipelines import schemas_selection as sel

MODELS = {
    "raw_history": s.RawHistory,
    "products": s.Products,
    "product_class_map": s.ProductClassMap,
    "customer_spans": s.CustomerSpans,
    "adjustments": s.Adjustments,
    "pins": s.Pins,
    "shortages": s.Shortages,
    "cleaned_history": s.CleanedHistory,
    "rejected_rows": s.RejectedRows,
    "history_corrections": s.HistoryCorrections,
    "cycle_calendar": s.CycleCalendar,
    "lifecycle_history": s.LifecycleHistory,
    "lifecycle_audit": s.LifecycleAudit,
    "share_tables": s.ShareTable,
    "period_basis": s.PeriodBasis,
    "reinitialized_target": s.ReinitializedTarget,
    "share_drift": f.ShareDrift,
    "backtest_accuracy": f.BacktestAccuracy,
    "backtest_losses": sel.BacktestLosses,
    "share_tuning": sel.ShareTuning,
    "strategy_choice": f.StrategyChoice,
    "parent_forecast": f.ParentForecast,
    "statistical_forecast": f.StatisticalForecast,
    "forecast_models": f.ForecastModels,
    "forecast_fitted_values": f.ForecastFittedValues,
    "upper_level_forecast": f.UpperLevelForecast,
    "reconciliation": f.Reconciliation,
    "plan_measures": f.PlanMeasures,
    "cycle_report": f.CycleReportFiles,
}
