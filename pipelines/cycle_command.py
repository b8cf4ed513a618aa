"""`python -m pipelines cycle|rebuild`: run the cycle's partitions with a progress display; the exit code.

The progress display follows the runs' events (pipelines/progress_display.py);
`--json` prints the summary as one object on stdout (pipelines/cycle_json.py).
"""

from __future__ import annotations

import os
import sys

from pipelines.config import LATEST_COMPLETE_PERIOD
from pipelines.errors import ConfigError
from pipelines.shards import partition_classes
from pipelines.summary import print_summary

# the command's exit codes (README, "What bad input gets")
EXIT_OK = 0  # every ERROR check passed (failed WARN checks are listed)
EXIT_CHECK_FAILED = 1  # a blocking (ERROR) check failed: its rows and what to do are printed
EXIT_BAD_INPUT = 2  # the input or config cannot be used at all (or a partition is busy): the error says what to do
EXIT_CRASH = 3  # a step failed on something that is not bad input: a bug; the run id and message are printed


def run_cycle(
    config_path: str,
    cycle: str | None = None,
    classes: list[str] | None = None,
    rebuild_from: str | None = None,
    summary: bool = True,
    backfill: int = 0,
    parallel: int = 1,
    if_busy: str = "wait",
    verbose: bool = False,
    as_json: bool = False,
) -> int:
    """Run the cycle (or, with `rebuild_from`, that asset and everything downstream) for each class; the exit code.

    EXIT_OK when no ERROR check failed, EXIT_CHECK_FAILED when one did,
    EXIT_BAD_INPUT when a step stopped on bad input or config (a PlanningError)
    or a partition was busy, EXIT_CRASH when a step failed on anything else.

    `parallel`: partitions run at once, each in its own process (1: one after
    another in this process). `if_busy`: when another run writes a partition,
    `wait` in the queue for it or `stop` (exit 2), naming that run.
    `verbose`: Dagster's own log on the console too (else only the progress
    display). `as_json`: the summary as one JSON object on stdout
    (pipelines/cycle_json.py); everything else goes to stderr.
    """
    from pipelines.instance_sqlite import fewer_flushes

    with fewer_flushes():  # the instance's SQLite files without an fsync per event (pipelines/instance_sqlite.py)
        if not as_json:
            return _run_cycle(config_path, cycle, classes, rebuild_from, summary, backfill, parallel, if_busy, verbose)
        return _run_cycle_json(config_path, cycle, classes, rebuild_from, summary, backfill, parallel, if_busy, verbose)


def _run_cycle_json(config_path, cycle, classes, rebuild_from, summary, backfill, parallel, if_busy, verbose) -> int:
    """run_cycle with --json: the summary as one JSON object on stdout, everything else on stderr."""
    import contextlib

    from pipelines.cycle_json import dumps

    report: dict = {}
    with contextlib.redirect_stdout(sys.stderr):
        code = _run_cycle(
            config_path, cycle, classes, rebuild_from, summary, backfill, parallel, if_busy, verbose, report
        )
    print(dumps(report))
    return code


def _run_cycle(
    config_path, cycle, classes, rebuild_from, summary, backfill, parallel, if_busy, verbose, report=None
) -> int:
    """run_cycle's work; fills `report` (when given) with the --json summary."""
    from rich.console import Console

    from pipelines.cycle_json import cycle_summary
    from pipelines.definitions import build_definitions
    from pipelines.partitions import current_cycle
    from pipelines.phases import run_count
    from pipelines.progress_display import CycleDisplay
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
    chosen = chosen_partitions(config, classes)
    every_key = partition_classes(config)
    if parallel < 1:
        raise ConfigError(f"--parallel {parallel}: give 1 or more partitions to run at once")
    defs = build_definitions(config_path)
    selection = rebuild_selection(defs, rebuild_from) if rebuild_from else None
    what = f"{rebuild_from} and downstream" if rebuild_from else "whole cycle"
    command = f"rebuild --from {rebuild_from}" if rebuild_from else "cycle"
    wait_seconds = 0 if if_busy == "stop" else None

    # what the progress lines name; a class that decides over its shards runs each shard in two phases
    graph = defs.resolve_asset_graph()
    now = {"cycle": cycle, "what": what, "of": run_count(config, chosen, graph, selection)}
    from pipelines.runner import dagster_instance

    instance = dagster_instance()
    # a live display only on a terminal, and not under Dagster's own log lines (--verbose)
    stream = _display_stream()
    display = CycleDisplay(instance, Console(file=stream, highlight=False), live=False if verbose else None)

    def started(i: int, product_class: str, run_id: str) -> None:
        display.say(f"[{i}/{now['of']}] cycle {now['cycle']}, class {product_class}: {now['what']} ...")
        display.started(now["cycle"], product_class, run_id)

    def done(outcome: PartitionOutcome) -> None:
        display.finished(outcome.run_id)
        display.say(
            f"    {outcome.product_class}: run {outcome.run_id}: {'succeeded' if outcome.success else 'FAILED'} "
            f"in {outcome.seconds:.0f} s"
        )
        for step, message in outcome.failures:
            display.say(f"    step {step} failed: {message}")

    # Dagster's console log only with --verbose; every event stays in the instance (and the UI) either way
    run_config = {"loggers": {"console": {"config": {"log_level": "INFO" if verbose else "CRITICAL"}}}}
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
                all_classes=every_key,
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
            all_classes=every_key,
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
    by_cycle: dict[str, list[PartitionOutcome]] = {}
    try:
        with display:
            for earlier in _missing_earlier_cycles(config, cycle, backfill):
                display.say(
                    f"backfill: cycle {earlier} is not published in the store yet; running it first "
                    "(share drift compares with it)"
                )
                now.update(cycle=earlier, what="whole cycle", of=run_count(config, every_key, graph, None))
                past = by_cycle[earlier] = run_classes(earlier, every_key, None, None)
                every += past
                ok = ok and all(o.success for o in past) and blocking_checks_pass(past)
            now.update(cycle=cycle, what=what, of=run_count(config, chosen, graph, selection))
            outcomes = by_cycle[cycle] = run_classes(cycle, chosen, selection, rebuild_from)
    finally:
        if stream is not sys.stdout:
            stream.close()
    checks = [
        (f"{e.asset_key.to_user_string()} [{o.product_class}]", e.check_name, e.passed, e.severity.value)
        for o in outcomes
        for e in o.checks
    ]
    if summary:
        print_summary(config_path, checks, cycle=cycle, failures=failed_checks(outcomes))
    # the page again after every class ran, so a run a blocking check stopped shows its failure there too
    from pipelines.cycle_report import write_cycle_report

    page = write_cycle_report(config, instance, cycle)
    print(f"report:       {page}")
    every += outcomes
    kinds = {kind for o in every for kind in o.failure_kinds}
    # a failed WARN check is reported but does not fail the command; an ERROR check does
    ok = ok and all(o.success for o in outcomes) and blocking_checks_pass(outcomes)
    if any(o.exit_code == 2 for o in outcomes) or "bad_input" in kinds:
        code = EXIT_BAD_INPUT
    elif "crash" in kinds:
        code = EXIT_CRASH
    else:
        code = EXIT_OK if ok else EXIT_CHECK_FAILED
    if report is not None:
        report.update(cycle_summary(command, cycle, code, by_cycle, display.summary(), str(page)))
    return code


def chosen_partitions(config, classes: list[str] | None) -> list[str]:
    """The product-class partition keys to run: every class's (a class cut into shards: its shards), or those of
    `--class` (a class: all its shards; a shard's own key `seasonal~2of4`: that shard); a ConfigError naming an
    unknown one."""
    every = partition_classes(config)
    if not classes:
        return every
    unknown = [c for c in classes if c not in config.product_classes and c not in every]
    if unknown:
        raise ConfigError(
            f"{config.source}: --class {unknown} not under product_classes; valid classes are "
            f"{sorted(config.product_classes)} (or one shard of a class cut into shards: {every})"
        )
    keys = [k for c in classes for k in (partition_classes(config, [c]) if c in config.product_classes else [c])]
    return list(dict.fromkeys(keys))


def _display_stream():
    """The display's own stream onto stdout's file. While a step runs, Dagster sends file descriptors 1 and 2
    through its compute-log capture; the display writes beside it, so its lines and live bar reach the
    terminal in order and stay out of the steps' logs. sys.stdout itself where it has no file (a test's capture)."""
    try:
        fd = sys.stdout.fileno()
    except (AttributeError, OSError, ValueError):
        return sys.stdout
    sys.stdout.flush()
    return os.fdopen(os.dup(fd), "w", buffering=1)


def _missing_earlier_cycles(config, cycle: str, count: int) -> list[str]:
    """The `count` cycles before `cycle` that are not published in the store, oldest first."""
    import pandas as pd

    from pipelines.calendar import shift_periods
    from pipelines.partitions import cycle_key
    from pipelines.resources import stored_cycles

    have = set(stored_cycles(config.store.path))
    earlier = [cycle_key(shift_periods(pd.Timestamp(cycle), -k, config.calendar.period)) for k in range(count, 0, -1)]
    return [c for c in earlier if c not in have]
