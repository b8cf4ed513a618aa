"""A failed check in words: its partition, first failing rows and what to do, for the console and the report.

Every check result carries `first_failing_rows` (a markdown table of its first
rows: file and row where the asset is an input file, the keys, the column and
the value) and `partition_cycle` / `partition_class` in its metadata
(`assets.common`, which `first_schema_failures` serves for a failed schema). The
description of its check spec says what to do ("When it fails, ..."). Nothing
here runs a check.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import pandas as pd

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


FIRST_ROWS = 5  # failing rows printed on the console and in the cycle report
KEY_COLUMNS = ("product", "site", "customer", "period_start", "measure")
SCHEMA_FIX = "correct the listed rows (file and row given where the asset is an input file) and run the cycle again"


def first_schema_failures(cases: pd.DataFrame, df: pd.DataFrame, row_column: str) -> pd.DataFrame:
    """The first failure cases, one line each: where (file, row), the row's keys, the column, the check, the value."""
    # cases that name a row first, one per row and column (pandera adds follow-up errors of the same cell)
    if row_column in cases.columns:
        named = pd.to_numeric(cases[row_column], errors="coerce").notna()
    else:
        named = pd.Series(False, index=cases.index)
    if "schema_context" in cases.columns and named.any():
        # a check over the whole row (e.g. span_ordered): one line per row and check, the cells it read as value
        whole = named & (cases["schema_context"] == "DataFrameSchema")
        if whole.any():
            keys = set(KEY_COLUMNS)
            parts = cases[whole].assign(cell=lambda d: d["column"].astype(str) + "=" + d["failure_case"].astype(str))
            merged = (
                parts[~parts["column"].isin(keys)]
                .groupby([row_column, "check"], sort=False)
                .agg(cell=("cell", "; ".join))
                .reset_index()
            )
            first_of = parts.drop_duplicates([row_column, "check"]).drop(columns=["cell"])
            first_of = first_of.merge(merged, on=[row_column, "check"], how="left")
            first_of["column"] = "(row)"
            first_of["failure_case"] = first_of.pop("cell").fillna("")
            cases = pd.concat([first_of, cases[~whole]], ignore_index=True)
            named = pd.to_numeric(cases[row_column], errors="coerce").notna()
    unnamed = cases[~named]
    if "column" in cases.columns:  # a check that failed on the whole column, after a cell of it was named already
        unnamed = unnamed[~unnamed["column"].isin(cases.loc[named, "column"])]
    ordered = pd.concat([cases[named], unnamed])
    subset = [c for c in (row_column, "column") if c in ordered.columns]
    head = ordered[~(named[ordered.index] & ordered.duplicated(subset))].head(FIRST_ROWS).copy()
    where = [c for c in ("file", row_column) if c in head.columns]
    keys = [c for c in KEY_COLUMNS if c in df.columns]
    labels = pd.to_numeric(head[row_column], errors="coerce") if row_column in head.columns else pd.Series(dtype=float)
    for key in keys:
        values = []
        for label in labels:
            try:
                values.append("" if pd.isna(label) else str(df.loc[int(label), key]))
            except (KeyError, ValueError, TypeError):
                values.append("")
        head[key] = values
    columns = where + keys + [c for c in ("column", "check", "failure_case") if c in head.columns]
    return head[columns].astype(str).replace({"None": "", "nan": ""}).rename(columns={"failure_case": "value"})
