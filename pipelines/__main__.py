"""Command line: `python -m pipelines cycle` runs the weekly cycle and prints its summary.

python -m pipelines cycle [--config config/planning.yaml] [--cycle YYYY-MM-DD] [--class CLS ...] [--parallel K]
                          [--if-busy wait|stop]
python -m pipelines rebuild --class CLS [--from share_tables] [--cycle YYYY-MM-DD]
python -m pipelines summary [--config ...] [--cycle YYYY-MM-DD]   # a stored cycle, no run
python -m pipelines explain PRODUCT SITE CUSTOMER [--period P] [--cycle C]   # how a leaf value was made
python -m pipelines report [--cycle C]             # the cycle's HTML page again
python -m pipelines views                          # the DuckDB views over the published cycles again
python -m pipelines demo-data [--out data/demo]   # regenerate the bundled demo files
"""

from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path

from pipelines.errors import ConfigError, PlanningError

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
    parallel: int = 1,
    if_busy: str = "wait",
) -> int:
    """Run the cycle (or, with `rebuild_from`, that asset and everything downstream) for each class; 0 when no
    ERROR check failed.

    `parallel`: partitions run at once, each in its own process (1: one after
    another in this process). `if_busy`: when another run writes a partition,
    `wait` in the queue for it or `stop` (exit 2), naming that run.
    """
    from pipelines.definitions import build_definitions
    from pipelines.partitions import current_cycle
    from pipelines.resources import PlanningConfigResource
    from pipelines.runner import (
        PartitionOutcome,
        blocking_checks_pass,
        rebuild_selection,
        run_partitions,
        run_partitions_parallel,
    )
    from pipelines.store import PartitionBusy, open_store
    from pipelines.store.dagster_io import mark_dead_runs_failed
    from pipelines.store.locks import describe

    config = PlanningConfigResource(path=config_path).config
    cycle = current_cycle(config, cycle)
    chosen = classes or list(config.product_classes)
    unknown = [c for c in chosen if c not in config.product_classes]
    if unknown:
        raise ConfigError(
            f"{config.source}: --class {unknown} not under product_classes; valid classes are "
            f"{sorted(config.product_classes)}"
        )
    if parallel < 1:
        raise ConfigError(f"--parallel {parallel}: give 1 or more partitions to run at once")
    defs = build_definitions(config_path)
    selection = rebuild_selection(defs, rebuild_from) if rebuild_from else None
    what = f"{rebuild_from} and downstream" if rebuild_from else "whole cycle"
    command = f"rebuild --from {rebuild_from}" if rebuild_from else "cycle"
    wait_seconds = 0 if if_busy == "stop" else None

    now = {"cycle": cycle, "what": what, "of": len(chosen)}  # what the progress lines name

    def started(i: int, product_class: str) -> None:
        print(f"[{i}/{now['of']}] cycle {now['cycle']}, class {product_class}: {now['what']} ...", flush=True)

    def done(outcome: PartitionOutcome) -> None:
        print(
            f"    {outcome.product_class}: run {outcome.run_id}: {'succeeded' if outcome.success else 'FAILED'} "
            f"in {outcome.seconds:.0f} s",
            flush=True,
        )
        for step, message in outcome.failures:
            print(f"    step {step} failed: {message}")

    run_config = {"loggers": {"console": {"config": {"log_level": "INFO"}}}}
    instance = _instance()
    # runs whose process died (kill -9, out of memory) would stay STARTED for ever and block the run queue
    for message in mark_dead_runs_failed(instance):
        print(f"recovery: {message}", flush=True)
    store = open_store(config.store.path)
    store.check_layout()

    def run_classes(
        run_cycle_key: str, run_classes: list[str], run_selection, first: str | None
    ) -> list[PartitionOutcome]:
        if if_busy == "stop":
            busy = {k: h for k in run_classes if (h := store.writer_of(run_cycle_key, k)) is not None}
            if busy:
                raise PartitionBusy(
                    "; ".join(
                        f"partition {run_cycle_key}|{k} is being written by {describe(h)}" for k, h in busy.items()
                    )
                    + " (--if-busy wait to queue behind it)",
                    next(iter(busy.values())),
                )
        if parallel > 1:
            return run_partitions_parallel(
                config_path,
                instance,
                run_cycle_key,
                run_classes,
                parallel=parallel,
                all_classes=list(config.product_classes),
                first=first,
                run_config=run_config,
                on_start=started,
                on_done=done,
                wait_seconds=wait_seconds,
                command=command,
            )
        result = run_partitions(
            defs,
            instance,
            run_cycle_key,
            run_classes,
            all_classes=list(config.product_classes),
            selection=run_selection,
            run_config=run_config,
            on_start=started,
            wait_seconds=wait_seconds,
            command=command,
            on_done=lambda k, r, sec: done(PartitionOutcome.from_result(k, r, sec)),
        )
        return [PartitionOutcome.from_result(k, r, result.seconds[k]) for k, r in result.results.items()]

    ok = True
    for earlier in _missing_earlier_cycles(config, cycle, backfill):
        print(
            f"backfill: cycle {earlier} is not published in the store yet; running it first "
            "(share drift compares with it)",
            flush=True,
        )
        now.update(cycle=earlier, what="whole cycle", of=len(config.product_classes))
        past = run_classes(earlier, list(config.product_classes), None, None)
        ok = ok and all(o.success for o in past) and blocking_checks_pass(past)
    now.update(cycle=cycle, what=what, of=len(chosen))
    # progress at INFO on the console; the full event log stays in the instance (and the UI)
    outcomes = run_classes(cycle, chosen, selection, rebuild_from)
    checks = [
        (f"{e.asset_key.to_user_string()} [{o.product_class}]", e.check_name, e.passed, e.severity.value)
        for o in outcomes
        for e in o.checks
    ]
    if summary:
        print_summary(config_path, checks, cycle=cycle)
    # the page again after every class ran, so a run a blocking check stopped shows its failure there too
    from pipelines.cycle_report import write_cycle_report

    print(f"report:       {write_cycle_report(config, instance, cycle)}")
    if any(o.exit_code == 2 for o in outcomes):
        return 2
    # a failed WARN check is reported but does not fail the command; an ERROR check does
    return 0 if ok and all(o.success for o in outcomes) and blocking_checks_pass(outcomes) else 1


def _missing_earlier_cycles(config, cycle: str, count: int) -> list[str]:
    """The `count` cycles before `cycle` that are not published in the store, oldest first."""
    import pandas as pd

    from pipelines.calendar import shift_periods
    from pipelines.partitions import cycle_key
    from pipelines.resources import stored_cycles

    have = set(stored_cycles(config.store.path))
    earlier = [cycle_key(shift_periods(pd.Timestamp(cycle), -k, config.calendar.period)) for k in range(count, 0, -1)]
    return [c for c in earlier if c not in have]


def print_summary(
    config_path: str, checks: list[tuple[str, str, bool, str]] | None = None, cycle: str | None = None
) -> None:
    """The summary of a published cycle (default the latest); an incomplete cycle is marked as such."""
    from pipelines.resources import PlanningConfigResource, read_table
    from pipelines.store import open_store

    config = PlanningConfigResource(path=config_path).config
    store = open_store(config.store.path)
    if not store.check_layout():
        print(f"no store at {store.root}: nothing has been materialized yet")
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
        if checks is not None:
            _print_checks(checks)
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
    if checks is not None:
        _print_checks(checks)
    print(f"open the UI:  {UI_COMMAND}")


def _print_checks(checks: list[tuple[str, str, bool, str]]) -> None:
    failed = [c for c in checks if not c[2]]
    print(f"checks:       {len(checks) - len(failed)} passed, {len(failed)} failed")
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
        raise PlanningError(f"no cycle published in the store {store} yet; run one first (make demo)")
    if cycle is not None and cycle not in cycles:
        raise PlanningError(
            f"cycle {cycle} is not published in the store {store} (python -m pipelines summary says why); "
            f"published cycles: {', '.join(cycles)}"
        )
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
        raise PlanningError(f"no cycle published in the store {config.store.path} yet; run one first (make demo)")
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

    def run_args(p):
        p.add_argument(
            "--parallel",
            type=int,
            default=1,
            metavar="K",
            help="run K partitions (classes) at once, one process each (default 1: one after another)",
        )
        p.add_argument(
            "--if-busy",
            choices=("wait", "stop"),
            default="wait",
            help="when another run writes a partition: wait in the queue for it (default) or stop with exit 2",
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
        help="first run the N cycles before it that the store has not published",
    )
    run_args(p)
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
    run_args(p)
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
    p = sub.add_parser(
        "views", help="write the DuckDB views over the published cycles again (<store>/published.duckdb)"
    )
    config_arg(p)
    p = sub.add_parser("demo-data", help="regenerate the bundled demo input files")
    p.add_argument("--out", default="data/demo")
    p.add_argument("--seed", type=int, default=None)
    args = parser.parse_args(argv)
    try:
        if args.command == "cycle":
            return run_cycle(
                args.config,
                cycle=args.cycle,
                classes=args.classes,
                backfill=args.backfill,
                parallel=args.parallel,
                if_busy=args.if_busy,
            )
        if args.command == "rebuild":
            return run_cycle(
                args.config,
                cycle=args.cycle,
                classes=args.classes,
                rebuild_from=args.asset,
                parallel=args.parallel,
                if_busy=args.if_busy,
            )
        if args.command == "explain":
            return explain(args.config, args.product, args.site, args.customer, args.period, args.cycle)
        if args.command == "report":
            return report(args.config, args.cycle)
        if args.command == "views":
            from pipelines.resources import PlanningConfigResource
            from pipelines.store import open_store

            store = open_store(PlanningConfigResource(path=args.config).config.store.path)
            if not store.check_layout():
                raise PlanningError(f"no store at {store.root} yet; run a cycle first (make demo)")
            print(store.refresh_views())
            return 0
        if args.command == "summary":
            print_summary(args.config, cycle=args.cycle)
            return 0
        from pipelines import demo_data

        demo_data.main(["--out", args.out] + (["--seed", str(args.seed)] if args.seed is not None else []))
        return 0
    except PlanningError as err:
        print(f"error: {err}", file=sys.stderr)
        return 2


if __name__ == "__main__":
    sys.exit(main())
