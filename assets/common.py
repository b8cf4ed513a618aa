"""What every asset does the same way: schema checks, rule checks and metadata."""

import dagster as dg
import pandas as pd
import pandera.errors
import pandera.pandas as pa

SAMPLE_ROWS = 20
PREVIEW_ROWS = 8
FIRST_ROWS = 5  # failing rows printed on the console and in the cycle report
FIRST_FAILING_ROWS = "first_failing_rows"
KEY_COLUMNS = ("product", "site", "customer", "period_start", "measure")


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
        elif isinstance(value, bool):
            meta[key] = dg.MetadataValue.bool(value)
        elif isinstance(value, int):
            meta[key] = dg.MetadataValue.int(value)
        elif isinstance(value, float):
            meta[key] = dg.MetadataValue.float(value)
        else:
            meta[key] = dg.MetadataValue.text(str(value))
    return meta


def schema_check_name(asset_name: str) -> str:
    return f"{asset_name}_matches_schema"


def schema_check_spec(asset_name: str, model: type[pa.DataFrameModel]) -> dg.AssetCheckSpec:
    first_line = (model.__doc__ or "").strip().splitlines()[0] if model.__doc__ else ""
    return dg.AssetCheckSpec(
        name=schema_check_name(asset_name),
        asset=asset_name,
        blocking=True,
        description=(
            f"Proves that {asset_name} matches its pandera model {model.__name__} ({first_line}): "
            f"columns, types, ranges and keys. When it fails, the metadata lists the failing rows and "
            f"checks; correct the input or stage named there and rematerialize."
        ),
    )


def partition_metadata() -> dict:
    """The cycle and product class of the partition being materialized ({} outside a partitioned run).

    Every check result carries them, so the UI, the console and the report say
    which class an evaluation is for.
    """
    try:
        key = dg.AssetExecutionContext.get().partition_key
    except Exception:  # no run, or a run without a partition: nothing to add
        return {}
    cycle, _, product_class = str(key).partition("|")
    return {"partition_cycle": dg.MetadataValue.text(cycle), "partition_class": dg.MetadataValue.text(product_class)}


SCHEMA_FIX = "correct the listed rows (file and row given where the asset is an input file) and run the cycle again"


def _first_schema_failures(cases: pd.DataFrame, df: pd.DataFrame, row_column: str) -> pd.DataFrame:
    """The first failure cases, one line each: where (file, row), the row's keys, the column, the check, the value."""
    # cases that name a row first, one per row and column (pandera adds follow-up errors of the same cell)
    named = pd.to_numeric(cases[row_column], errors="coerce").notna() if row_column in cases.columns else pd.Series(False, index=cases.index)
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


def validate(
    df: pd.DataFrame, model: type[pa.DataFrameModel], asset_name: str, source: str | None = None
) -> tuple[pd.DataFrame, dg.AssetCheckResult]:
    """Validate lazily against `model`; the coerced frame (or `df` unchanged on failure) and the check result.

    `source`: the input file `df` was read from, its index being each line's
    `source_row`; the failing rows and cases then say `file` and `row`.
    """
    try:
        out = model.validate(df, lazy=True)
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
        first = _first_schema_failures(cases, df, "row" if located else "index")
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
                **partition_metadata(),
            },
        )
    return out, dg.AssetCheckResult(
        asset_key=asset_name,
        check_name=schema_check_name(asset_name),
        passed=True,
        metadata={"rows_checked": dg.MetadataValue.int(len(df)), **partition_metadata()},
    )


def rule_check(
    asset_name: str,
    check_name: str,
    failing: pd.DataFrame,
    *,
    what: str,
    severity: dg.AssetCheckSeverity = dg.AssetCheckSeverity.ERROR,
    **extra,
) -> dg.AssetCheckResult:
    """A check result (ERROR unless `severity` says WARN) that passes when `failing` is empty; failing rows sampled in metadata."""
    metadata = {
        "failing_count": dg.MetadataValue.int(len(failing)),
        "proves": dg.MetadataValue.text(what),
    }
    if len(failing):
        metadata["failing_rows_sample"] = markdown(failing, rows=SAMPLE_ROWS)
        metadata[FIRST_FAILING_ROWS] = markdown(failing, rows=FIRST_ROWS)
    for key, value in extra.items():
        metadata[key] = value if isinstance(value, dg.MetadataValue) else dg.MetadataValue.text(str(value))
    metadata.update(partition_metadata())
    return dg.AssetCheckResult(
        asset_key=asset_name,
        check_name=check_name,
        passed=failing.empty,
        severity=severity,
        metadata=metadata,
    )
