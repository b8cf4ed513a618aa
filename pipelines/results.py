"""What a stage's `run(...)` returns: its output tables, the failing rows of its checks, its figures, its files.

A stage knows nothing of Dagster: `assets.factory` turns a `StageResult` into
outputs, check results and metadata, and the benchmark reads the same object.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import pandas as pd

Log = Callable[[str], None]


class Markdown(str):
    """A figure to show as markdown (e.g. an inline picture), not as plain text."""


@dataclass(frozen=True)
class CheckRows:
    """The outcome of one rule check: the failing rows (none = it passed) and figures beside them."""

    rows: pd.DataFrame
    figures: dict[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class StageResult:
    """outputs: table name -> frame. checks: check name (pipelines.checks) -> CheckRows. metadata: table
    name -> figures a planner looks at (numbers, text, small frames, paths, Markdown). files: file name ->
    bytes to write beside the cycle's report (pictures). sources: table name -> the input file its rows were
    read from (None when an optional file is absent); such a table is indexed by each line's `source_row`, so
    its failing rows are named by file and row, and the index is dropped before the table is stored."""

    outputs: dict[str, pd.DataFrame]
    checks: dict[str, CheckRows] = field(default_factory=dict)
    metadata: dict[str, dict[str, Any]] = field(default_factory=dict)
    files: dict[str, bytes] = field(default_factory=dict)
    sources: dict[str, str | None] = field(default_factory=dict)


def quiet(_: str) -> None:
    """The log of a run nobody watches."""
