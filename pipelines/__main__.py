"""Command line: `python -m pipelines cycle` runs the weekly cycle and prints its summary.

python -m pipelines cycle [--config config/planning.yaml] [--cycle YYYY-MM-DD] [--class CLS ...] [--parallel K]
                          [--if-busy wait|stop]
python -m pipelines rebuild --class CLS [--from share_tables] [--cycle YYYY-MM-DD]
python -m pipelines summary [--config ...] [--cycle YYYY-MM-DD]   # a stored cycle, no run
python -m pipelines explain PRODUCT SITE CUSTOMER [--period P] [--cycle C]   # how a leaf value was made
python -m pipelines report [--cycle C]             # the cycle's HTML page again
python -m pipelines views                          # the DuckDB views over the published cycles again
python -m pipelines export --cycle C [--class K] --format parquet|csv --to DIR   # a published cycle as files
python -m pipelines demo-data [--out data/demo]   # regenerate the bundled demo files
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from pipelines import export
from pipelines.config import LATEST_COMPLETE_PERIOD
from pipelines.errors import ConfigError, PlanningError
from pipelines.summary import print_summary

# the command's exit codes (README, "What bad input gets")
EXIT_OK = 0  # every ERROR check passed (failed WARN checks are listed)
EXIT_CHECK_FAILED = 1  # a blocking (ERROR) check failed: its rows and what to do are printed
EXIT_BAD_INPUT = 2  # the input or config cannot be used at all (or a partition is busy): the error says what to do
EXIT_CRASH = 3  # a step failed on something that is not bad input: a bug; the run id and message are printed


def _instance():
    from pipelines.runner import dagster_instance

    return dagster_instance()


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
    """Run the cycle (or, with `rebuild_from`, that asset and everything downstream) for each class; the exit code.

    EXIT_OK when no ERROR check failed, EXIT_CHECK_FAILED when one did,
    EXIT_BAD_INPUT when a step stopped on bad input or config (a PlanningError)
    or a partition was busy, EXIT_CRASH when a step failed on anything else.

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
    from pipelines.summary import failed_checks

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
    every = []  # the outcomes of every run, backfill included: their failed steps decide the exit code
    for earlier in _missing_earlier_cycles(config, cycle, backfill):
        print(
            f"backfill: cycle {earlier} is not published in the store yet; running it first "
            "(share drift compares with it)",
            flush=True,
        )
        now.update(cycle=earlier, what="whole cycle", of=len(config.product_classes))
        past = run_classes(earlier, list(config.product_classes), None, None)
        every += past
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
        print_summary(config_path, checks, cycle=cycle, failures=failed_checks(outcomes))
    # the page again after every class ran, so a run a blocking check stopped shows its failure there too
    from pipelines.cycle_report import write_cycle_report

    print(f"report:       {write_cycle_report(config, instance, cycle)}")
    every += outcomes
    kinds = {kind for o in every for kind in o.failure_kinds}
    if any(o.exit_code == 2 for o in outcomes) or "bad_input" in kinds:
        return EXIT_BAD_INPUT
    if "crash" in kinds:
        return EXIT_CRASH
    # a failed WARN check is reported but does not fail the command; an ERROR check does
    ok = ok and all(o.success for o in outcomes) and blocking_checks_pass(outcomes)
    return EXIT_OK if ok else EXIT_CHECK_FAILED


def _missing_earlier_cycles(config, cycle: str, count: int) -> list[str]:
    """The `count` cycles before `cycle` that are not published in the store, oldest first."""
    import pandas as pd

    from pipelines.calendar import shift_periods
    from pipelines.partitions import cycle_key
    from pipelines.resources import stored_cycles

    have = set(stored_cycles(config.store.path))
    earlier = [cycle_key(shift_periods(pd.Timestamp(cycle), -k, config.calendar.period)) for k in range(count, 0, -1)]
    return [c for c in earlier if c not in have]


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
    export.add_parser(sub, config_arg)
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
        if args.command == "export":
            return export.command(args)
        from pipelines import demo_data

        demo_data.main(["--out", args.out] + (["--seed", str(args.seed)] if args.seed is not None else []))
        return 0
    except PlanningError as err:
        print(f"error: {err}", file=sys.stderr)
        return EXIT_BAD_INPUT


if __name__ == "__main__":
    sys.exit(main())
