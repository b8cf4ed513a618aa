"""The checks a watcher relies on: names that stay put across releases, descriptions that say what to do.

A rename here breaks dashboards and alerts that watch a check by name, so the
list below changes only together with a release note and the old -> new table
of DEVELOPERS.md (common practice, no source).
"""

import dagster as dg

from pipelines.definitions import ASSETS

RULE_CHECKS = {
    ("cleaned_history", "every_raw_row_accounted", "ERROR"),
    ("cleaned_history", "corrections_explain_changes", "ERROR"),
    ("rejected_rows", "rejected_rows_within_limit", "WARN"),
    ("share_tables", "new_customers_have_share", "WARN"),  # new_customer_without_share until this release
    ("share_tables", "fallback_share_within_limit", "WARN"),
    ("share_drift", "share_drift_within_limit", "WARN"),
    ("strategy_choice", "chosen_strategy_beats_seasonal_naive", "WARN"),  # on backtest_accuracy until this release
    ("share_tuning", "share_choice_near_best", "WARN"),
    ("reconciliation", "children_sum_to_parent", "ERROR"),
    ("upper_level_forecast", "upper_levels_coherent", "ERROR"),
    ("reinitialized_target", "shares_sum_to_one", "ERROR"),  # on reconciliation until this release
    ("statistical_forecast", "no_volume_after_phase_out", "ERROR"),  # on reconciliation until this release
    ("statistical_forecast", "no_volume_outside_active_span", "ERROR"),  # on reconciliation until this release
    ("statistical_forecast", "no_negative_forecast", "ERROR"),  # on reconciliation until this release
    ("reconciliation", "every_active_parent_has_children", "ERROR"),
    ("plan_measures", "measures_sum_to_parent", "ERROR"),
    ("plan_measures", "pins_kept", "ERROR"),
    ("plan_measures", "pins_within_parent", "WARN"),  # pins_exceed_parent until this release
    ("customer_spans", "references_known", "WARN"),
    ("shortages", "references_known", "WARN"),
    ("adjustments", "references_known", "WARN"),
    ("pins", "references_known", "ERROR"),
    ("publication", "tables_passed_their_checks", "ERROR"),
}


def _specs():
    return [s for a in ASSETS for s in a.check_specs]


def test_rule_check_names_and_kinds_are_stable():
    found = {
        (s.asset_key.to_user_string(), s.name, "ERROR" if s.blocking else "WARN")
        for s in _specs()
        if not s.name.endswith("_matches_schema")
    }
    assert found == RULE_CHECKS


def test_every_asset_has_a_blocking_schema_check():
    assets = {k.to_user_string() for k in dg.AssetSelection.all().resolve(ASSETS)}
    schema = {s.asset_key.to_user_string() for s in _specs() if s.name.endswith("_matches_schema") and s.blocking}
    assert schema == assets


def test_every_description_says_what_it_proves_and_what_to_do_when_it_fails():
    for spec in _specs():
        text = spec.description or ""
        assert text.startswith(("Proves", "Warns")), spec.name
        assert "When it f" in text, spec.name  # "When it fails" / "When it fires"


def test_the_catalogue_is_what_the_assets_carry():
    from pipelines.checks import CHECKS, RENAMED

    assert {(c.asset, c.name, c.severity) for c in CHECKS} == RULE_CHECKS
    # a renamed check's old name is no check any more, and its new name is one
    names = {c.name for c in CHECKS}
    assert set(RENAMED.values()) <= names and not set(RENAMED) & names


def test_every_check_names_a_property_not_a_failure():
    from pipelines.checks import CHECKS

    for check in CHECKS:
        assert not any(word in check.name for word in ("without", "exceed", "missing", "fail")), check.name
