"""Command line: `python -m pipelines cycle` runs the weekly cycle and prints its summary.

    python -m pipelines cycle [--config config/planning.yaml] [--cycle YYYY-MM-DD] [--class CLS ...]
    python -m pipelines rebuild --class CLS [--from share_tables] [--cycle YYYY-MM-DD]
    python -m pipelines summary [--config ...] [--cycle YYYY-MM-DD]   # a stored cycle, no run
    python -m pipelines explain PRODUCT SITE CUSTOMER [--period P] [--cycle C]   # how a leaf value was made
    python -m pipelines report [--cycle C]             # the cycle's HTML page again
    python -m pipelines demo-data [--out data/demo]   # regenerate the bundled demo files
"""

from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path

from pipelines.config import LATEST_COMPLETE_PERIOD
from pipelines.errors import ConfigError, PlanningError

# the command's exit codes (README, "What bad input gets")
EXIT_OK = 0  # every ERROR check passed (failed WARN checks are listed)
EXIT_CHECK_FAILED = 1  # a blocking (ERROR) check failed: its rows and what to do are printed
EXIT_BAD_INPUT = 2  # the input or config cannot be used at all: the error names file, row or key and what to do
EXIT_CRASH = 3  # a step failed on something that is not bad input: a bug; the run id and message are printed

UI_COMMAND = "make ui   (dagster dev -m pipelines.definitions -h 127.0.0.1 -p 3000)"


def _instance():
    import dagster as dg

    home = os.environ.get("DAGSTER_HOME")
    if not home:
        print(
            "DAGSTER_HOME is not set, so the run would vanish with a temporary instance.\n"
            "Set it to a folder that will hold runs and check history, e.g.\n"
            "  export DAGSTER_HOME=$PWD/.dagster   (make demo does this)",
            file=sys.stderr,
        )
        raise SystemExit(2)
    Path(home).mkdir(parents=True, exist_ok=True)
    return dg.DagsterInstance.get()


def run_cycle(
    config_path: str,
    cycle: str | None = None,
    classes: list[str] | None = None,
    rebuild_from: str | None = None,
    summary: bool = True,
    backfill: int = 0,
) -> int:
    """Run the cycle (or, with `rebuild_from`, that asset and everything downstream) for each class; the exit code.

    EXIT_OK when no ERROR check failed, EXIT_CHECK_FAILED when one did,
    EXIT_BAD_INPUT when a step stopped on bad input or config (a PlanningError),
    EXIT_CRASH when a step failed on anything else.
    """
    from pipelines.definitions import build_definitions
    from pipelines.partitions import current_cycle
    from pipelines.resources import PlanningConfigResource
    from pipelines.runner import rebuild_selection, run_partitions

    config = PlanningConfigResource(path=config_path).config
    if cycle is None and config.calendar.cycle_date == LATEST_COMPLETE_PERIOD:
        from pipelines.engines.history_files import choose_cycle_date
        from pipelines.partitions import cycle_key

        choice = choose_cycle_date(config.inputs, config.calendar.period)
        print(choice.describe(), flush=True)
        cycle = cycle_key(choice.cycle_date) if choice.cycle_date is not None else None
    cycle = current_cycle(config, cycle)
    chosen = classes or list(config.product_classes)
    unknown = [c for c in chosen if c not in config.product_classes]
    if unknown:
        raise ConfigError(
            f"{config.source}: --class {unknown} not under product_classes; valid classes are "
            f"{sorted(config.product_classes)}"
        )
    defs = build_definitions(config_path)
    selection = rebuild_selection(defs, rebuild_from) if rebuild_from else None
    what = f"{rebuild_from} and downstream" if rebuild_from else "whole cycle"

    now = {"cycle": cycle, "what": what, "of": len(chosen)}  # what the progress lines name

    def started(i: int, product_class: str) -> None:
        print(f"[{i}/{now['of']}] cycle {now['cycle']}, class {product_class}: {now['what']} ...", flush=True)

    def done(product_class: str, result, seconds: float) -> None:
        print(f"    run {result.run_id}: {'succeeded' if result.success else 'FAILED'} in {seconds:.0f} s", flush=True)
        for event in (e for e in result.all_events if e.is_step_failure):
            error = event.event_specific_data.error
            message = error.cause.message if error and error.cause else (error.message if error else event.message)
            print(f"    step {event.step_key} failed: {message.strip()}")

    run_config = {"loggers": {"console": {"config": {"log_level": "INFO"}}}}
    instance = _instance()
    ok = True
    runs_done = []
    for earlier in _missing_earlier_cycles(config, cycle, backfill):
        print(
            f"backfill: cycle {earlier} is not in the store yet; running it first (share drift compares with it)",
            flush=True,
        )
        now.update(cycle=earlier, what="whole cycle", of=len(config.product_classes))
        past = run_partitions(
            defs, instance, earlier, list(config.product_classes), run_config=run_config, on_start=started, on_done=done
        )
        runs_done.append(past)
        ok = ok and past.success and past.blocking_checks_pass
    now.update(cycle=cycle, what=what, of=len(chosen))
    # progress at INFO on the console; the full event log stays in the instance (and the UI)
    run = run_partitions(
        defs,
        instance,
        cycle,
        chosen,
        all_classes=list(config.product_classes),
        selection=selection,
        run_config=run_config,
        on_start=started,
        on_done=done,
    )
    checks = [
        (f"{e.asset_key.to_user_string()} [{c}]", e.check_name, e.passed, e.severity.value)
        for c, e in run.checks_by_class()
    ]
    if summary:
        print_summary(config_path, checks, cycle=cycle, failures=_failures(run))
    # the page again after every class ran, so a run a blocking check stopped shows its failure there too
    from pipelines.cycle_report import write_cycle_report

    print(f"report:       {write_cycle_report(config, instance, cycle)}")
    # a failed WARN check is reported but does not fail the command; an ERROR check does
    failed_steps = [_failure_kind(e) for r in runs_done + [run] for e in r.all_events if e.is_step_failure]
    if "bad_input" in failed_steps:
        return EXIT_BAD_INPUT
    if "crash" in failed_steps:
        return EXIT_CRASH
    return EXIT_OK if ok and run.success and run.blocking_checks_pass else EXIT_CHECK_FAILED


def _failure_kind(event) -> str:
    """Why a step failed: `bad_input` (a PlanningError), `check` (a blocking check failed) or `crash` (else)."""
    names = {c.__name__ for c in _subclasses(PlanningError)}
    error = event.event_specific_data.error
    while error is not None:
        if error.cls_name in names:
            return "bad_input"
        if "AssetCheck" in (error.cls_name or ""):
            return "check"
        error = error.cause
    return "crash"


def _subclasses(cls) -> list[type]:
    return [cls] + [s for c in cls.__subclasses__() for s in _subclasses(c)]


def _failures(run) -> list:
    """The failed check evaluations of the cycle's runs, with their first rows and what to do."""
    from pipelines.check_failures import failure_of
    from pipelines.cycle_report import check_descriptions

    descriptions = check_descriptions()
    return [
        failure_of(e, descriptions.get((e.asset_key.to_user_string(), e.check_name), ""), product_class=c)
        for c, e in run.checks_by_class()
        if not e.passed
    ]


def _missing_earlier_cycles(config, cycle: str, count: int) -> list[str]:
    """The `count` cycles before `cycle` that have no cycle_calendar rows in the store, oldest first."""
    import pandas as pd

    from pipelines.calendar import shift_periods
    from pipelines.partitions import cycle_key
    from pipelines.resources import stored_cycles

    have = set(stored_cycles(config.store.path))
    earlier = [cycle_key(shift_periods(pd.Timestamp(cycle), -k, config.calendar.period)) for k in range(count, 0, -1)]
    return [c for c in earlier if c not in have]


def print_summary(
    config_path: str,
    checks: list[tuple[str, str, bool, str]] | None = None,
    cycle: str | None = None,
    failures: list | None = None,
) -> None:
    from pipelines.resources import PlanningConfigResource, read_table, stored_cycles

    config = PlanningConfigResource(path=config_path).config
    store = Path(config.store.path)
    cycles = stored_cycles(store) if store.exists() else []
    if not cycles:
        print(f"no cycle in the store {store} yet: nothing has been materialized")
        _print_checks(checks, failures)
        return
    cycle = cycle or cycles[-1]

    def table(name: str):
        return read_table(store, name, cycle=cycle)  # None when the run stopped before this asset

    def count(name: str) -> str:
        frame = table(name)
        return "-" if frame is None else f"{len(frame):,}"

    print()
    print(f"store:        {store.resolve()}  (one table per asset, every cycle kept; query with duckdb)")
    print(f"cycles:       {', '.join(cycles)}  (this summary: {cycle})")
    cal = table("cycle_calendar")
    if cal is not None and len(cal):
        c = cal.iloc[0]
        print(f"cycle date:   {c['cycle_date']:%Y-%m-%d}, {c['horizon']} {c['period']}s ahead, "
              f"history from {c['history_start']:%Y-%m-%d} ({c['history_periods']} periods)")
    print(f"rows in:      {count('raw_history')} raw history lines, {count('rejected_rows')} rejected, "
          f"{count('history_corrections')} corrections")
    print(f"rows out:     {count('share_tables')} shares, {count('parent_forecast')} parent forecast rows, "
          f"{count('statistical_forecast')} leaf forecast rows, {count('reconciliation')} reconciliation rows")
    shares = table("share_tables")
    if shares is not None and len(shares):
        parents = shares.drop_duplicates(["product", "site"])
        print("classes:")
        for name, group in shares.groupby("product_class"):
            pc = config.product_classes.get(name)
            how = f"window {pc.window}, {pc.method}" if pc else "not in config"
            p = parents[parents["product_class"] == name]
            fallbacks = int((p["fallback"] != "none").sum())
            print(
                f"  {name:<14} {len(p):>4} parents {len(group):>5} children  ({how}; {fallbacks} parents used a "
                "fallback)"
            )
    choice = table("strategy_choice")  # as the cycle decided it, not decided again from today's config
    if choice is not None and len(choice):
        print("strategy:     (backtest, leaf-grain WMAPE; margin = runner-up minus chosen)")
        for _, row in choice.iterrows():
            print(
                f"  {row['product_class']:<14} {row['strategy']:<21} WMAPE {row['leaf_wmape']:.3f}  "
                f"margin {row['margin']:+.4f} over {row['runner_up'] or '-'}  seasonal naive "
                f"{row['seasonal_naive_wmape']:.3f}"
                f"  ({row['configured_strategy']})"
            )
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


def _print_checks(checks: list[tuple[str, str, bool, str]] | None, failures: list | None) -> None:
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


def explain(config_path: str, product: str, site: str, customer: str, period: str | None, cycle: str | None) -> int:
    """Print how one leaf value was made, from the store only."""
    from pipelines.explain import OPTIONAL_TABLES, REQUIRED_TABLES, explain_leaf
    from pipelines.resources import PlanningConfigResource, read_table, stored_cycles

    config = PlanningConfigResource(path=config_path).config
    store = Path(config.store.path)
    cycles = stored_cycles(store)
    if not cycles:
        raise PlanningError(f"no cycle in the store {store} yet; run one first (make demo)")
    if cycle is not None and cycle not in cycles:
        raise PlanningError(f"cycle {cycle} is not in the store {store}; stored cycles: {', '.join(cycles)}")
    cycle = cycle or cycles[-1]
    parent = {"product": product.strip(), "site": site.strip()}
    tables = {
        name: read_table(store, name, cycle=cycle, where=None if name == "share_tables" else parent)
        for name in REQUIRED_TABLES + OPTIONAL_TABLES
    }
    print(explain_leaf({k: v for k, v in tables.items() if v is not None}, product, site, customer, period=period))
    return 0


def report(config_path: str, cycle: str | None) -> int:
    """Write the cycle's HTML page again from the store and the instance."""
    from pipelines.cycle_report import write_cycle_report
    from pipelines.resources import PlanningConfigResource, stored_cycles

    config = PlanningConfigResource(path=config_path).config
    cycles = stored_cycles(config.store.path)
    if not cycles:
        raise PlanningError(f"no cycle in the store {config.store.path} yet; run one first (make demo)")
    print(write_cycle_report(config, _instance(), cycle or cycles[-1]))
    return 0


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(
        prog="python -m pipelines", description="apportion: the weekly share refresh cycle"
    )
    sub = parser.add_subparsers(dest="command", required=True)

    def config_arg(p):
        p.add_argument(
            "--config", default="", help="planning config (default $APPORTION_CONFIG or config/planning.yaml)"
        )

    p = sub.add_parser("cycle", help="run the weekly cycle for every class (or --class ...) and print a summary")
    config_arg(p)
    p.add_argument(
        "--cycle",
        default=None,
        help="cycle date YYYY-MM-DD (default: calendar.cycle_date, else the period after the history)",
    )
    p.add_argument(
        "--class", dest="classes", action="append", default=None, help="only this product class (repeatable)"
    )
    p.add_argument(
        "--backfill",
        type=int,
        default=0,
        metavar="N",
        help="first run the N cycles before it that the store does not hold yet",
    )
    p = sub.add_parser(
        "rebuild",
        help="rematerialize one asset and everything downstream for one class, from the stored upstream tables",
    )
    config_arg(p)
    p.add_argument(
        "--class", dest="classes", action="append", required=True, help="product class to rebuild (repeatable)"
    )
    p.add_argument("--from", dest="asset", default="share_tables", help="first asset to rebuild (default share_tables)")
    p.add_argument("--cycle", default=None, help="cycle date (default: the current cycle)")
    p = sub.add_parser("summary", help="summarise a stored cycle (default the latest), no run")
    config_arg(p)
    p.add_argument("--cycle", default=None)
    p = sub.add_parser(
        "explain", help="how one leaf value was made: window, method, fallback, lifecycle, model, share, result"
    )
    config_arg(p)
    p.add_argument("product")
    p.add_argument("site")
    p.add_argument("customer")
    p.add_argument(
        "--period", default=None, help="a date inside a horizon period (default: every period of the horizon)"
    )
    p.add_argument("--cycle", default=None, help="a stored cycle (default the latest)")
    p = sub.add_parser("report", help="write the cycle's HTML report again (var/reports/<cycle>/cycle_report.html)")
    config_arg(p)
    p.add_argument("--cycle", default=None, help="a stored cycle (default the latest)")
    p = sub.add_parser("demo-data", help="regenerate the bundled demo input files")
    p.add_argument("--out", default="data/demo")
    p.add_argument("--seed", type=int, default=None)
    args = parser.parse_args(argv)
    try:
        if args.command == "cycle":
            return run_cycle(args.config, cycle=args.cycle, classes=args.classes, backfill=args.backfill)
        if args.command == "rebuild":
            return run_cycle(args.config, cycle=args.cycle, classes=args.classes, rebuild_from=args.asset)
        if args.command == "explain":
            return explain(args.config, args.product, args.site, args.customer, args.period, args.cycle)
        if args.command == "report":
            return report(args.config, args.cycle)
        if args.command == "summary":
            print_summary(args.config, cycle=args.cycle)
            return 0
        from pipelines import demo_data

        demo_data.main(["--out", args.out] + (["--seed", str(args.seed)] if args.seed is not None else []))
        return 0
    except PlanningError as err:
        print(f"error: {err}", file=sys.stderr)
        return EXIT_BAD_INPUT


if __name__ == "__main__":
    sys.exit(main())
