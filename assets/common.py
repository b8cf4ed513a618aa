"""What every asset does the same way: schema checks, rule checks and metadata."""

from pathlib import Path

import dagster as dg
import pandas as pd
import pandera.errors
import pandera.pandas as pa

from pipelines.check_failures import FIRST_FAILING_ROWS, FIRST_ROWS, SCHEMA_FIX, first_schema_failures
from pipelines.checks import schema_check, schema_check_name
from pipelines.results import Markdown
from pipelines.text_dtype import validate_table

SAMPLE_ROWS = 20
PREVIEW_ROWS = 8


def markdown(df: pd.DataFrame, rows: int = PREVIEW_ROWS) -> dg.MetadataValue:
    """A short markdown table of the first `rows` rows."""
    if df.empty:
        return dg.MetadataValue.md("_no rows_")
    head = df.head(rows).copy()
    for c in head.columns:
        if pd.api.types.is_datetime64_any_dtype(head[c]):
            head[c] = head[c].dt.strftime("%Y-%m-%d")
    return dg.MetadataValue.md(head.to_markdown(index=False, floatfmt=".4g"))


def table_metadata(df: pd.DataFrame, **figures) -> dict:
    """Row count, column schema, a preview, plus the figures a planner looks at."""
    schema = dg.TableSchema(columns=[dg.TableColumn(name=str(c), type=str(t)) for c, t in df.dtypes.items()])
    meta = {
        "dagster/row_count": dg.MetadataValue.int(len(df)),
        "dagster/column_schema": schema,
        "preview": markdown(df),
    }
    for key, value in figures.items():
        if isinstance(value, pd.DataFrame):
            meta[key] = markdown(value, rows=SAMPLE_ROWS)
        elif isinstance(value, dg.MetadataValue):
            meta[key] = value
        elif isinstance(value, Markdown):
            meta[key] = dg.MetadataValue.md(str(value))
        elif isinstance(value, Path):
            meta[key] = dg.MetadataValue.path(str(value))
        elif isinstance(value, bool):
            meta[key] = dg.MetadataValue.bool(value)
        elif isinstance(value, int):
            meta[key] = dg.MetadataValue.int(value)
        elif isinstance(value, float):
            meta[key] = dg.MetadataValue.float(value)
        else:
            meta[key] = dg.MetadataValue.text(str(value))
    return meta


def schema_check_spec(asset_name: str, model: type[pa.DataFrameModel]) -> dg.AssetCheckSpec:
    check = schema_check(asset_name, model)
    return dg.AssetCheckSpec(name=check.name, asset=asset_name, blocking=True, description=check.description)


def partition_metadata(partition: dict[str, str] | None) -> dict:
    """The cycle and product class of the partition a check judged, as metadata ({} when none is given).

    Every check result of the factory carries them, so the UI, the console and
    the report say which class an evaluation is for.
    """
    return {key: dg.MetadataValue.text(str(value)) for key, value in (partition or {}).items()}


def validate(
    df: pd.DataFrame,
    model: type[pa.DataFrameModel],
    asset_name: str,
    source: str | None = None,
    partition: dict[str, str] | None = None,
) -> tuple[pd.DataFrame, dg.AssetCheckResult]:
    """Validate lazily against `model`; the coerced frame (or `df` unchanged on failure) and the check result.

    `source`: the input file `df` was read from, its index being each line's
    `source_row`; the failing rows and cases then say `file` and `row`.
    `partition`: the partition's cycle and class, added to the metadata.
    """
    try:
        out = validate_table(model, df)
    except pandera.errors.SchemaErrors as err:
        cases = err.failure_cases.copy()
        by_check = cases.groupby(["column", "check"], dropna=False).size().reset_index(name="failures")
        located = source is not None and df.index.name == "source_row"
        index = pd.to_numeric(cases["index"], errors="coerce").dropna().astype(int).unique()
        rows = df.loc[df.index.intersection(index)].head(SAMPLE_ROWS)
        if located:
            rows = rows.reset_index().rename(columns={"source_row": "row"})
            rows.insert(0, "file", source)
            cases = cases.rename(columns={"index": "row"})
            cases.insert(0, "file", source)
        first = first_schema_failures(cases, df, "row" if located else "index")
        return df, dg.AssetCheckResult(
            asset_key=asset_name,
            check_name=schema_check_name(asset_name),
            passed=False,
            severity=dg.AssetCheckSeverity.ERROR,
            metadata={
                "failure_count": dg.MetadataValue.int(len(cases)),
                "failing_row_count": dg.MetadataValue.int(len(index)),
                "failures_by_check": markdown(by_check.astype(str), rows=SAMPLE_ROWS),
                "failure_cases_sample": markdown(cases.astype(str), rows=SAMPLE_ROWS),
                "failing_rows_sample": markdown(rows, rows=SAMPLE_ROWS),
                FIRST_FAILING_ROWS: markdown(first, rows=FIRST_ROWS),
                "what_to_do": dg.MetadataValue.text(SCHEMA_FIX),
                **partition_metadata(partition),
            },
        )
    return out, dg.AssetCheckResult(
        asset_key=asset_name,
        check_name=schema_check_name(asset_name),
        passed=True,
        metadata={"rows_checked": dg.MetadataValue.int(len(df)), **partition_metadata(partition)},
    )


def rule_check(
    asset_name: str,
    check_name: str,
    failing: pd.DataFrame,
    *,
    what: str,
    severity: dg.AssetCheckSeverity = dg.AssetCheckSeverity.ERROR,
    partition: dict[str, str] | None = None,
    **extra,
) -> dg.AssetCheckResult:
    """A check result (ERROR unless `severity` says WARN) that passes when `failing` is empty; failing rows
    sampled in metadata, the first of them as `first_failing_rows`, and the partition's cycle and class.
    """
    metadata = {
        "failing_count": dg.MetadataValue.int(len(failing)),
        "proves": dg.MetadataValue.text(what),
    }
    if len(failing):
        metadata["failing_rows_sample"] = markdown(failing, rows=SAMPLE_ROWS)
        metadata[FIRST_FAILING_ROWS] = markdown(failing, rows=FIRST_ROWS)
    for key, value in extra.items():
        metadata[key] = value if isinstance(value, dg.MetadataValue) else dg.MetadataValue.text(str(value))
    metadata.update(partition_metadata(partition))
    return dg.AssetCheckResult(
        asset_key=asset_name,
        check_name=check_name,
        passed=failing.empty,
        severity=severity,
        metadata=metadata,
    )
