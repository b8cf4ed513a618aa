"""A failed check in words: its partition, first failing rows and what to do, for the console and the report.

Every check result carries `first_failing_rows` (a markdown table of its first
rows: file and row where the asset is an input file, the keys, the column and
the value) and `partition_cycle` / `partition_class` in its metadata
(`assets.common`). The description of its check spec says what to do ("When it
fails, ..."). Nothing here runs a check.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

FIRST_FAILING_ROWS = "first_failing_rows"  # the metadata key assets.common writes
LINE_WIDTH = 200  # characters of a table line printed on the console


def metadata_text(metadata: Mapping, key: str) -> str:
    """The text of a metadata entry (a MetadataValue's value, or the plain value), '' when absent."""
    value = metadata.get(key)
    if value is None:
        return ""
    return str(getattr(value, "value", value) or "")


def what_to_do(description: str, metadata: Mapping | None = None) -> str:
    """The check's advice: its metadata's `what_to_do`, else the "When it fails/fires, ..." part of its description."""
    given = metadata_text(metadata or {}, "what_to_do")
    if given and given != "nothing":
        return given
    at = description.find("When it f")
    return description[at:].strip() if at >= 0 else description.strip()


@dataclass(frozen=True)
class Failure:
    """One failed check evaluation."""

    asset: str
    check: str
    severity: str
    product_class: str
    cycle: str
    failing: int | None
    rows: str  # markdown table of the first failing rows ('' when the check gave none)
    advice: str

    def lines(self, indent: str = "    ") -> list[str]:
        """The failure as console lines: the rows table, then what to do."""
        count = f" ({self.failing} failing)" if self.failing is not None else ""
        out = [f"  FAILED {self.severity:<5} {self.asset} [{self.product_class or '-'}]: {self.check}{count}"]
        for line in self.rows.splitlines():
            out.append(indent + (line if len(line) <= LINE_WIDTH else line[: LINE_WIDTH - 3] + "..."))
        if self.advice:
            out.append(f"{indent}what to do: {self.advice}")
        return out


def failure_of(evaluation, description: str = "", product_class: str = "") -> Failure:
    """A Failure from a Dagster AssetCheckEvaluation (or anything with asset_key, check_name, severity, metadata)."""
    metadata = evaluation.metadata or {}
    count = metadata.get("failing_count", metadata.get("failing_row_count"))
    failing = getattr(count, "value", count)
    return Failure(
        asset=evaluation.asset_key.to_user_string(),
        check=evaluation.check_name,
        severity=getattr(evaluation.severity, "value", str(evaluation.severity)),
        product_class=metadata_text(metadata, "partition_class") or product_class,
        cycle=metadata_text(metadata, "partition_cycle"),
        failing=int(failing) if isinstance(failing, (int, float)) else None,
        rows=metadata_text(metadata, FIRST_FAILING_ROWS),
        advice=what_to_do(description, metadata),
    )
