"""Command line: `python -m pipelines cycle` runs the planning cycle with a progress display and prints its summary.

python -m pipelines cycle [--config config/planning.yaml] [--cycle YYYY-MM-DD] [--class CLS ...] [--parallel K]
                          [--if-busy wait|stop] [--verbose] [--json]
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
import gc
import sys
from pathlib import Path

from pipelines import export
from pipelines.cycle_command import EXIT_BAD_INPUT, EXIT_CHECK_FAILED, EXIT_CRASH, EXIT_OK, run_cycle
from pipelines.errors import PlanningError
from pipelines.summary import print_summary

# the exit codes (README, "What bad input gets") live with the cycle command and are read from here too
__all__ = ["EXIT_BAD_INPUT", "EXIT_CHECK_FAILED", "EXIT_CRASH", "EXIT_OK", "main", "run_cycle"]


def _instance():
    from pipelines.runner import dagster_instance

    return dagster_instance()


def explain(config_path: str, product: str, site: str, customer: str, period: str | None, cycle: str | None) -> int:
    """Print how one leaf value was made, from the store only."""
    from pipelines.class_view import class_choice
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
    # a class cut into shards: its choice once, with the class's figures (a fixed class's: every shard's combined)
    tables["strategy_choice"] = class_choice(store, config, cycle, tables["strategy_choice"])
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
        prog="python -m pipelines",
        description="apportion: the share refresh cycle of each planning period (week or month)",
        epilog="exit codes of cycle and rebuild: 0 ok (failed WARN checks listed), 1 a blocking check failed, "
        "2 bad input or config (or a busy partition), 3 a step failed on a bug",
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
            help="run K partitions (classes or shards) at once, one process each (default 1: one after another)",
        )
        p.add_argument(
            "--if-busy",
            choices=("wait", "stop"),
            default="wait",
            help="when another run writes a partition: wait in the queue for it (default) or stop with exit 2",
        )
        p.add_argument("--verbose", action="store_true", help="Dagster's own log lines too (else: progress only)")
        p.add_argument(
            "--json", dest="as_json", action="store_true", help="print the summary as one JSON object on stdout"
        )

    p = sub.add_parser(
        "cycle", help="run the planning cycle for every class (or --class ...) with a progress display; a summary"
    )
    config_arg(p)
    p.add_argument(
        "--cycle",
        default=None,
        help="cycle date YYYY-MM-DD (default: calendar.cycle_date, else the period after the history)",
    )
    p.add_argument(
        "--class", dest="classes", action="append", default=None,
        help="only this product class (repeatable; a class cut into shards: all its shards, CLASS~IofN: one)",
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
        "--class", dest="classes", action="append", required=True,
        help="product class to rebuild (repeatable; a class cut into shards: all its shards, CLASS~IofN: one)",
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
                verbose=args.verbose,
                as_json=args.as_json,
            )
        if args.command == "rebuild":
            return run_cycle(
                args.config,
                cycle=args.cycle,
                classes=args.classes,
                rebuild_from=args.asset,
                parallel=args.parallel,
                if_busy=args.if_busy,
                verbose=args.verbose,
                as_json=args.as_json,
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
        if getattr(args, "as_json", False):
            from pipelines.cycle_json import dumps, error_summary

            print(dumps(error_summary(args.command, EXIT_BAD_INPUT, str(err))))
        return EXIT_BAD_INPUT


def end_process(code: int) -> None:
    """Exit with `code`, the objects still alive moved out of the garbage collector's reach first (`gc.freeze`).

    The interpreter's last collections at exit would walk every object the run
    left (about 500,000 after one class of the demo: 1.3-1.5 s of cpu,
    benchmarks/README.md, *The interpreter's exit*) only to free memory the
    process's end frees anyway. Nothing that has to happen at exit depends on
    them: the store's files and the instance's connections are closed by then,
    `atexit` handlers and the flush of stdout and stderr still run."""
    gc.freeze()
    sys.exit(code)


if __name__ == "__main__":
    end_process(main())
