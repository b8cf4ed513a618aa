"""The `--json` summary of `python -m pipelines cycle|rebuild`: one object on stdout for automation.

{"command", "cycle", "exit_code", "result", "classes": {class: {...}}, "earlier_cycles": {cycle: {class: ...}},
 "report"}; per class: run_id, success, seconds, stages (name, status, seconds, rows, tables, series),
checks (passed count, failed list with asset, check, severity) and failures (step, message, kind). The exit
codes are those of `pipelines.__main__` (README, "What bad input gets").
"""

from __future__ import annotations

import json

RESULTS = {0: "ok", 1: "check_failed", 2: "bad_input", 3: "crash"}


def class_summary(outcome, stages: dict | None) -> dict:
    """One partition's run: its outcome (runner.PartitionOutcome) and the stages the display saw."""
    failed = [
        {"asset": e.asset_key.to_user_string(), "check": e.check_name, "severity": e.severity.value}
        for e in outcome.checks
        if not e.passed
    ]
    kinds = list(outcome.failure_kinds) + [""] * (len(outcome.failures) - len(outcome.failure_kinds))
    return {
        "run_id": outcome.run_id,
        "success": bool(outcome.success),
        "seconds": round(outcome.seconds, 3),
        "stages": (stages or {}).get("stages", []),
        "checks": {"passed": sum(1 for e in outcome.checks if e.passed), "failed": failed},
        "failures": [
            {"step": step, "message": message, "kind": kind or None}
            for (step, message), kind in zip(outcome.failures, kinds, strict=True)
        ],
    }


def cycle_summary(
    command: str,
    cycle: str,
    exit_code: int,
    outcomes_by_cycle: dict[str, list],
    seen: dict[str, dict],
    report: str | None,
) -> dict:
    """The whole summary; `outcomes_by_cycle`: cycle -> outcomes (the earlier ones of --backfill too);
    `seen`: 'cycle|class' -> stages (progress_display.CycleDisplay.summary)."""

    def classes(run_cycle: str) -> dict:
        return {
            o.product_class: class_summary(o, seen.get(f"{run_cycle}|{o.product_class}"))
            for o in outcomes_by_cycle.get(run_cycle, [])
        }

    return {
        "command": command,
        "cycle": cycle,
        "exit_code": exit_code,
        "result": RESULTS.get(exit_code, "unknown"),
        "classes": classes(cycle),
        "earlier_cycles": {c: classes(c) for c in outcomes_by_cycle if c != cycle},
        "report": report,
    }


def error_summary(command: str, exit_code: int, message: str) -> dict:
    """The summary of a command that stopped before any run (bad config, busy partition)."""
    return {"command": command, "exit_code": exit_code, "result": RESULTS.get(exit_code, "unknown"), "error": message}


def dumps(summary: dict) -> str:
    return json.dumps(summary, indent=2, default=str)
