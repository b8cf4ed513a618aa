"""Every rule check of the cycle, once: its name, the asset it judges, whether it stops the cycle, what it says.

Check names are promised stable to users (dashboards and alerts watch them by
name); a rename is listed in DEVELOPERS.md with its old name. Each check hangs
on the asset whose rows it judges. ERROR checks are blocking (a failure stops
everything downstream); WARN checks list their rows and let the cycle go on.
Every asset also has a blocking `<asset>_matches_schema` check against its
pandera model (`schema_check`).
"""

from __future__ import annotations

from dataclasses import dataclass

# the tolerances the descriptions state (pipelines.stages.reconciliation uses them)
RELATIVE_TOLERANCE = 1e-9
SHARE_TOLERANCE = 1e-9


@dataclass(frozen=True)
class Check:
    name: str
    asset: str
    blocking: bool
    description: str

    @property
    def proves(self) -> str:
        """The description's first part: what the check proves or warns of, without what to do."""
        return self.description.split(". When")[0]

    @property
    def severity(self) -> str:
        return "ERROR" if self.blocking else "WARN"


EVERY_RAW_ROW_ACCOUNTED = "every_raw_row_accounted"
CORRECTIONS_EXPLAIN_CHANGES = "corrections_explain_changes"
REJECTED_ROWS_WITHIN_LIMIT = "rejected_rows_within_limit"
NEW_CUSTOMERS_HAVE_SHARE = "new_customers_have_share"
FALLBACK_SHARE_WITHIN_LIMIT = "fallback_share_within_limit"
SHARES_SUM_TO_ONE = "shares_sum_to_one"
SHARE_DRIFT_WITHIN_LIMIT = "share_drift_within_limit"
CHOSEN_STRATEGY_BEATS_SEASONAL_NAIVE = "chosen_strategy_beats_seasonal_naive"
SHARE_CHOICE_NEAR_BEST = "share_choice_near_best"
NO_VOLUME_AFTER_PHASE_OUT = "no_volume_after_phase_out"
NO_VOLUME_OUTSIDE_ACTIVE_SPAN = "no_volume_outside_active_span"
NO_NEGATIVE_FORECAST = "no_negative_forecast"
CHILDREN_SUM_TO_PARENT = "children_sum_to_parent"
UPPER_LEVELS_COHERENT = "upper_levels_coherent"
EVERY_ACTIVE_PARENT_HAS_CHILDREN = "every_active_parent_has_children"
MEASURES_SUM_TO_PARENT = "measures_sum_to_parent"
PINS_KEPT = "pins_kept"
PINS_WITHIN_PARENT = "pins_within_parent"
TABLES_PASSED_THEIR_CHECKS = "tables_passed_their_checks"
REFERENCES_KNOWN = "references_known"  # one name on four inputs: each judges its own file's rows


def _references(asset: str, what: str, blocking: bool) -> Check:
    """The check that the rows of the input `asset` name only what the master data and config hold."""
    verb = "Proves" if blocking else "Warns unless it holds:"
    after = "the cycle of the class stops before plan_measures" if blocking else "the cycle goes on without those rows"
    return Check(
        REFERENCES_KNOWN,
        asset,
        blocking,
        f"{verb} {what}. When it fails, {after}; the failing rows give file, row, column, value and what to do: "
        f"correct the {asset} file or the master data, and run the cycle again.",
    )


CHECKS: tuple[Check, ...] = (
    Check(
        EVERY_RAW_ROW_ACCOUNTED,
        "cleaned_history",
        True,
        "Proves raw lines = lines summed into cleaned_history + rejected_rows, so no line is lost. "
        "When it fails, compare the counts in the metadata and report the stage as a bug.",
    ),
    Check(
        CORRECTIONS_EXPLAIN_CHANGES,
        "cleaned_history",
        True,
        "Proves, per series, raw total + audited corrections = cleaned total, so every changed "
        "number is in history_corrections. When it fails, the series listed changed without an audit row.",
    ),
    Check(
        REJECTED_ROWS_WITHIN_LIMIT,
        "rejected_rows",
        False,
        "Warns when more than monitoring.max_rejected_share of the class's raw history lines were rejected "
        "(lines on or "
        "after the cycle date are not counted: they belong to a later cycle), with counts by reason and a sample. When "
        "it fires, correct the listed lines at their source (file and row are given) or the master data they miss, "
        "and rerun the cycle.",
    ),
    Check(
        NEW_CUSTOMERS_HAVE_SHARE,
        "share_tables",
        False,
        "Warns when a new customer (fewer periods of own history than lifecycle.min_history_periods) "
        "has neither a reference_customer nor an initial_share, so it gets no share until it has that much "
        "history; the rows list them. When it fires (a warning, not a stop): give the listed spans a "
        "reference_customer or an initial_share in customer_spans if their volume should be planned now.",
    ),
    Check(
        FALLBACK_SHARE_WITHIN_LIMIT,
        "share_tables",
        False,
        "Warns when more than monitoring.max_fallback_share of the class's parents took their shares from a fallback "
        "(a longer window, or an even split when no window had volume), listing those parents. When it fires, the "
        "class's window is too short for its history: lengthen product_classes.<class>.window, or check that the "
        "parents' history arrived.",
    ),
    Check(
        SHARES_SUM_TO_ONE,
        "reinitialized_target",
        True,
        f"Proves the shares of every parent in every horizon period sum to 1 within {SHARE_TOLERANCE:g}, "
        "or are all 0 with a recorded zero_reason. When it fails, the listed parent periods of reinitialized_target "
        "are inconsistent; rebuild share_tables and reinitialized_target.",
    ),
    Check(
        SHARE_DRIFT_WITHIN_LIMIT,
        "share_drift",
        False,
        "Warns when a child's base share moved more than monitoring.max_share_drift_pp percentage points since the "
        "previous cycle of its class (a new or gone child counts from or to 0). When it fires, look at the listed "
        "children: a real change of mix (new contract, lost customer) is fine; otherwise inspect their history "
        "corrections and lifecycle spans before the split is used.",
    ),
    Check(
        CHOSEN_STRATEGY_BEATS_SEASONAL_NAIVE,
        "strategy_choice",
        False,
        "Warns when a product class's strategy (the backtest's choice for `auto`, else the configured one) has a "
        "higher leaf-grain backtest WMAPE than seasonal naive. When it fires, the listed classes' models add no value "
        "over the benchmark: review their models, or the history the backtest saw.",
    ),
    Check(
        SHARE_CHOICE_NEAR_BEST,
        "share_tuning",
        False,
        "Warns when a class with a fixed share window and method splits worse in the backtest than the best "
        "candidate of selection.share_tuning by more than selection.share_tuning.max_gain (relative, on the class's "
        "selection metric), listing its candidates with the best one. When it fires, consider the best window and "
        "method shown (or window: auto / method: auto); a fixed choice may still be right for reasons the backtest "
        "does not see (a known change of mix).",
    ),
    Check(
        NO_VOLUME_AFTER_PHASE_OUT,
        "statistical_forecast",
        True,
        "Proves no customer gets forecast volume in a period after its span ends. When it fails, "
        "check the listed customers' active_to in customer_spans.",
    ),
    Check(
        NO_VOLUME_OUTSIDE_ACTIVE_SPAN,
        "statistical_forecast",
        True,
        "Proves no customer gets forecast volume before its span starts, and no product or "
        "customer outside the product's active span. When it fails, check active_from in customer_spans and the "
        "product's span in products for the listed rows.",
    ),
    Check(
        NO_NEGATIVE_FORECAST,
        "statistical_forecast",
        True,
        "Proves no parent or leaf forecast is negative. When it fails, look at the listed rows' model "
        "in parent_forecast and at planner inputs.",
    ),
    Check(
        CHILDREN_SUM_TO_PARENT,
        "reconciliation",
        True,
        "Proves the leaf forecast of every parent and period sums to the parent forecast as the class's strategy "
        "produced it (parent_forecast.strategy_forecast: the model's forecast, the reconciled parent or the sum of the "
        f"active children's own forecasts; never a sum of the leaves) within {RELATIVE_TOLERANCE:g} relative (one "
        "unit floor), and that the final parent forecast is that value. Periods the lifecycle set to 0 (zero_reason) "
        "are left out of that comparison, counted by reason in the metadata, and must carry no leaf volume. When it "
        "fails, the listed parent periods lost or gained volume between the strategy and the leaves (the why column "
        "says which side): inspect their rows in statistical_forecast and parent_forecast and report the split.",
    ),
    Check(
        UPPER_LEVELS_COHERENT,
        "upper_level_forecast",
        True,
        "Proves every node of the levels above the parent (hierarchy.upper_levels) holds the sum of its children's "
        "forecast and strategy_forecast in every period: the lowest level's the parents' in parent_forecast (by the "
        f"products master data), a higher level's the nodes below naming it, within {RELATIVE_TOLERANCE:g} relative "
        "(one unit floor). When it fails, the listed nodes and periods disagree with the grain below: inspect their "
        "rows in upper_level_forecast and parent_forecast and report the reconciliation.",
    ),
    Check(
        EVERY_ACTIVE_PARENT_HAS_CHILDREN,
        "reconciliation",
        True,
        "Proves every active parent has at least one child in the forecast to carry its volume: the active parents "
        "are taken from the master data (a product active in the horizon with a customer span active in it, at that "
        "site), not from the forecast, and a forecast parent without a child fails too. When it fails, the why "
        "column says which: a parent missing from parent_forecast or statistical_forecast is a defect of the cycle "
        "to report; a forecast parent without a child needs customer spans for the listed product x site, or the "
        "product retired.",
    ),
    Check(
        MEASURES_SUM_TO_PARENT,
        "plan_measures",
        True,
        "Proves that every measure reaches the leaf without losing or inventing anything: for even and "
        "pro_rata measures the customers of each product x site sum to its value in every period (pins counted; "
        "integer measures to the value rounded to the pack; 1e-9 relative), for replicate measures every unpinned "
        "customer holds the parent value and every active customer has a row. When it fails, the metadata lists the "
        "parent periods: 'no active child carries the value' means a value was entered where no customer is active "
        "(correct the adjustments row or the customer spans); any other reason is a defect of the split to report.",
    ),
    Check(
        PINS_KEPT,
        "plan_measures",
        True,
        "Proves that every pin of the pins input is the value of its customer, product, site, period and "
        "measure in the plan. When it fails, the metadata lists the pins with the reason: a pin on a customer that is "
        "not active in that period cannot be kept (correct the pin's period or customer, or its customer span).",
    ),
    Check(
        PINS_WITHIN_PARENT,
        "plan_measures",
        False,
        "Warns when pins take more than their parent holds (with pins.on_overflow: warn), listing the "
        "parent periods: the pins are kept, the other customers get 0, and the customers sum to the pins, not to the "
        "parent. When it fires (a warning, not a stop): lower the listed pins or raise the parent value if the parent "
        "should hold.",
    ),
    _references(
        "customer_spans",
        "every span's product is in the product master and every reference_customer has a span of the same "
        "product and site",
        False,
    ),
    _references("shortages", "every shortage names a product and site that has customer spans", False),
    _references(
        "adjustments",
        "every adjustment names a product and site that has customer spans, and a measure of the config",
        False,
    ),
    _references(
        "pins", "every pin names a customer with a span of its product and site, and a measure of the config", True
    ),
    Check(
        TABLES_PASSED_THEIR_CHECKS,
        "publication",
        True,
        "Proves that every table version this class publishes passed its blocking checks in the run that wrote it (a "
        "rebuild reuses the stored upstream tables, which an earlier run may have written and failed). When it fails, "
        "the class is not recorded complete and readers keep the last published cycle; rebuild from the first listed "
        "asset (python -m pipelines rebuild --class CLASS --from ASSET) or rerun the cycle.",
    ),
)
# check names of earlier releases -> their names now (DEVELOPERS.md lists them for users)
RENAMED = {"new_customer_without_share": NEW_CUSTOMERS_HAVE_SHARE, "pins_exceed_parent": PINS_WITHIN_PARENT}


def checks_of(asset: str) -> list[Check]:
    """The rule checks that judge `asset`, in catalogue order."""
    return [c for c in CHECKS if c.asset == asset]


def check_of(asset: str, name: str) -> Check:
    """The rule check `name` on `asset` (a name such as references_known hangs on several assets)."""
    return next(c for c in CHECKS if c.asset == asset and c.name == name)


def schema_check_name(asset: str) -> str:
    return f"{asset}_matches_schema"


def schema_check(asset: str, model) -> Check:
    """The blocking check that `asset` matches its pandera model `model`."""
    first_line = (model.__doc__ or "").strip().splitlines()[0] if model.__doc__ else ""
    return Check(
        schema_check_name(asset), asset, True,
        f"Proves that {asset} matches its pandera model {model.__name__} ({first_line}): "
        f"columns, types, ranges and keys. When it fails, the metadata lists the failing rows and "
        f"checks; correct the input or stage named there and rematerialize.",
    )
