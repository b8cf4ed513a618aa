"""The command line's summary of a cycle: what the store holds of it and the checks of the runs just made.

`python -m pipelines summary` prints it for a stored cycle; `cycle` and
`rebuild` print it after their runs, with every failed check's first failing
rows and what to do (`pipelines.check_failures`).
"""

from __future__ import annotations

from pipelines.check_failures import Failure, failure_of

UI_COMMAND = "make ui   (dagster dev -m pipelines.definitions -h 127.0.0.1 -p 3000)"


def print_summary(
    config_path: str,
    checks: list[tuple[str, str, bool, str]] | None = None,
    cycle: str | None = None,
    failures: list[Failure] | None = None,
) -> None:
    """The summary of a published cycle (default the latest); an incomplete cycle is marked as such.

    `checks`: (asset [class], check, passed, severity) of the runs just made;
    `failures`: their failed checks with first rows and what to do
    (`failed_checks`), printed ERROR first. Printed even when nothing of the
    cycle reached the store.
    """
    from pipelines.class_view import class_choice
    from pipelines.resources import PlanningConfigResource, read_table
    from pipelines.store import open_store

    config = PlanningConfigResource(path=config_path).config
    store = open_store(config.store.path)
    if not store.check_layout():
        print(f"no store at {store.root}: nothing has been materialized yet")
        _print_checks(checks, failures)
        return
    classes = list(config.product_classes)
    published = store.published_cycles()
    asked = cycle
    if cycle is None or cycle not in published:
        cycle = max((c for c in published if asked is None or c <= asked), default=None)

    print()
    print(
        f"store:        {store.root.resolve()}  (a Parquet file per asset partition; published cycles as SQL views in "
        f"{store.views_path})"
    )
    print(
        f"cycles:       {', '.join(published) or 'none published yet'}"
        + (f"  (this summary: {cycle})" if cycle else "")
    )
    for status in (store.status(c, classes) for c in store.known_cycles()):
        if not status.incomplete or (status.cycle < (cycle or "") and status.cycle != asked):
            continue
        if status.is_published:
            head = (
                f"a later run of cycle {status.cycle} has not completed; readers still see it as published "
                f"{status.published['published_at'][:19]} UTC"
            )
        else:
            head = (
                f"cycle {status.cycle} is not published: nothing of it is visible until every class passed its "
                "blocking checks"
            )
        print(f"INCOMPLETE:   {head}")
        for k in classes:
            print(f"                {status.describe_class(k)}")
    if cycle is None:
        _print_checks(checks, failures)
        print(f"open the UI:  {UI_COMMAND}")
        return

    def table(name: str):
        return read_table(store.root, name, cycle=cycle)  # None when the table is not in the store

    def count(name: str) -> str:
        frame = table(name)
        return "-" if frame is None else f"{len(frame):,}"

    cal = table("cycle_calendar")
    if cal is not None and len(cal):
        c = cal.iloc[0]
        print(
            f"cycle date:   {c['cycle_date']:%Y-%m-%d}, {c['horizon']} {c['period']}s ahead, "
            f"history from {c['history_start']:%Y-%m-%d} ({c['history_periods']} periods)"
        )
    print(
        f"rows in:      {count('raw_history')} raw history lines, {count('rejected_rows')} rejected, "
        f"{count('history_corrections')} corrections"
    )
    print(
        f"rows out:     {count('share_tables')} shares, {count('parent_forecast')} parent forecast rows, "
        f"{count('statistical_forecast')} leaf forecast rows, {count('reconciliation')} reconciliation rows"
    )
    shares = table("share_tables")
    if shares is not None and len(shares):
        parents = shares.drop_duplicates(["product", "site"])
        print("classes:")
        for name, group in shares.groupby("product_class"):
            pc = config.product_classes.get(name)
            # the window and method the cycle followed (the share tuning's choice for auto), not today's config
            windows = ", ".join(str(int(w)) for w in sorted(group["window"].unique()))
            how = f"window {windows}, {', '.join(sorted(group['method'].unique()))}" if pc else "not in config"
            p = parents[parents["product_class"] == name]
            fallbacks = int((p["fallback"] != "none").sum())
            print(
                f"  {name:<14} {len(p):>4} parents {len(group):>5} children  ({how}; {fallbacks} parents used a "
                "fallback)"
            )
    # as the cycle decided it, not decided again from today's config; a class cut into shards once, with the
    # class's figures (pipelines.class_view)
    choice = class_choice(store.root, config, cycle, table("strategy_choice"))
    if choice is not None and len(choice):
        print("strategy:     (backtest, leaf grain; judged by the class's metric; margin = runner-up minus chosen)")
        for _, row in choice.iterrows():
            print(
                f"  {row['product_class']:<14} {row['strategy']:<21} WMAPE {row['leaf_wmape']:.3f}  "
                f"RMSSE {row.get('leaf_rmsse', float('nan')):.3f}  by {row.get('metric', 'wmape')}: "
                f"{_margin(row)}  seasonal naive WMAPE "
                f"{row['seasonal_naive_wmape']:.3f}"
                f"  ({row['configured_strategy']})"
            )
            if "detail" in row:
                print(f"  {'':<14} {row['decision']}: {row['detail']}")
    print_share_tuning(table("share_tuning"))
    drift = table("share_drift")
    if drift is not None and len(drift):
        limit = config.monitoring.max_share_drift_pp
        print(
            f"share drift:  vs cycle {drift['previous_cycle'].iloc[0]}; "
            f"{int((drift['abs_change_pp'] > limit).sum())} children "
            f"moved more than {limit:g} pp; biggest moves:"
        )
        for _, r in drift.sort_values("abs_change_pp", ascending=False).head(5).iterrows():
            print(
                f"  {r['product_class']:<14} {r['product']}/{r['site']}/{r['customer']:<8} "
                f"{r['share_previous']:.3f} -> "
                f"{r['share_current']:.3f}  ({r['change_pp']:+.2f} pp, {r['status']})"
            )
    elif drift is not None:
        print("share drift:  no previous cycle in the store to compare with (python -m pipelines cycle --backfill 1)")
    _print_checks(checks, failures)
    print(f"open the UI:  {UI_COMMAND}")


def print_share_tuning(tuning) -> None:
    """Per class: the share window and method the cycle follows, the configured ones, the best and the gain."""
    if tuning is None or not len(tuning):
        return
    print("share split:  (backtest, leaf grain of the top-down split; gain = how much better the best scored)")
    for name, group in tuning.groupby("product_class", sort=False):
        chosen = group[group["chosen"].astype(bool)].iloc[0]
        best = group[group["best"].astype(bool)].iloc[0]
        configured = f"window {chosen['configured_window']}, {chosen['configured_method']}"
        print(
            f"  {name:<14} {chosen['method']}/{chosen['window']:<4} {chosen['metric']} {chosen['score']:.4f}  "
            f"(configured {configured}); best {best['candidate']} {best['score']:.4f}, gain {chosen['gain']:.1%}"
        )
        print(f"  {'':<14} {chosen['decision']}: {chosen['detail']}")


def _print_checks(checks: list[tuple[str, str, bool, str]] | None, failures: list[Failure] | None) -> None:
    """Checks passed and failed; each failed one with its first failing rows and what to do (ERROR first)."""
    if checks is None:
        return
    failed = [c for c in checks if not c[2]]
    print(f"checks:       {len(checks) - len(failed)} passed, {len(failed)} failed")
    if failures is not None:
        for failure in sorted(failures, key=lambda f: f.severity != "ERROR"):
            print("\n".join(failure.lines()))
    else:
        for asset, name, _, severity in failed:
            print(f"  FAILED {severity:<5} {asset}: {name}")


def failed_checks(outcomes) -> list[Failure]:
    """The failed check evaluations of the runs' outcomes (`pipelines.runner.PartitionOutcome`), with their
    first rows and what to do."""
    from pipelines.cycle_report import check_descriptions

    descriptions = check_descriptions()
    return [
        failure_of(e, descriptions.get((e.asset_key.to_user_string(), e.check_name), ""), product_class=o.product_class)
        for o in outcomes
        for e in o.checks
        if not e.passed
    ]


def _margin(row) -> str:
    """The margin over the runner-up; a fixed class, backtested with its own strategy alone, has none."""
    if not row["runner_up"] or row["margin"] != row["margin"]:  # NaN
        return "no runner-up (fixed strategy)"
    return f"margin {row['margin']:+.4f} over {row['runner_up']}"
