"""The history from a database (`inputs.history`): one SQL query read in chunks, as the lines the files give.

Same contract as the history files (`pipelines.engines.history_files`): one
row per line, every cell text as written (blank for NULL), with where it came
from: `source_file` holds `inputs.history.source` (default `history_query`)
and `source_row` the row's `row_id` when the query returns one (a key of the
table, so a rejected row names the database row), else its 1-based place in
the result. Cells are trimmed and checked as a Parquet file's are
(`reader.screen_cells`): a cell longer than `inputs.max_line_bytes` or with a
control character rejects its row (`line_too_long`, `control_characters`);
`cleaned_history` then applies the same rules, so the same lines give the same
cleaned history from a file or from a table.

Values of other types than text are written as text the way a file would hold
them: a date `YYYY-MM-DD`, a date-time `YYYY-MM-DDTHH:MM:SS[+HH:MM]` (the date
as written counts, as for files), a decimal in plain notation, a float by its
shortest repr.

Reading: a server-side cursor (SQLAlchemy `stream_results`) fetches
`inputs.history.chunk_rows` rows at a time and each chunk becomes Arrow
text columns at once, so the driver never holds the whole result as Python
objects. The password (in the URL or from `inputs.history.password_env`) is
never printed: every message goes through `errors.hide_passwords`.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import os
from decimal import Decimal
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from pipelines.config_inputs import HISTORY_QUERY_COLUMNS, HistoryQuery, InputsConfig
from pipelines.engines.inputs import HISTORY_COLUMNS, HistoryFile
from pipelines.engines.reader import screen_cells, text_read
from pipelines.errors import InputFileError, hide_passwords

ROW_ID = "row_id"


class HistoryQueryError(InputFileError):
    """The history database cannot be reached, or the history query fails or returns what it must not."""


def _text(value) -> str:
    if value is None:
        return ""
    if isinstance(value, str):
        return value
    if isinstance(value, dt.datetime):
        return value.isoformat()
    if isinstance(value, dt.date):
        return value.isoformat()
    if isinstance(value, Decimal):
        return format(value, "f")
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return repr(value)
    if isinstance(value, (bytes, bytearray, memoryview)):
        return bytes(value).decode("utf-8", errors="replace")
    return str(value)


def _column_text(values) -> pa.Array:
    """One column of a chunk as Arrow text (null for NULL, blanked by `screen_cells`); other types as `_text`."""
    try:
        return pa.array(values, pa.string())  # text columns: straight into Arrow
    except (pa.ArrowTypeError, pa.ArrowInvalid):
        return pa.array([v if v.__class__ is str else _text(v) for v in values], pa.string())


def _engine(history: HistoryQuery):
    """The SQLAlchemy engine and the secrets no message may show."""
    import sqlalchemy as sa
    from sqlalchemy.engine import make_url
    from sqlalchemy.pool import NullPool

    url = make_url(history.url)
    if history.password_env:
        password = os.environ.get(history.password_env)
        if password is None:
            raise HistoryQueryError(
                f"inputs.history.password_env names the environment variable {history.password_env}, which is not "
                f"set; set it to the password of {history.describe()} before the run"
            )
        url = url.set(password=password)
    secrets = tuple(s for s in (url.password,) if s)
    return sa.create_engine(url, poolclass=NullPool), secrets


def _first_line(err: BaseException) -> str:
    """The driver's own message (SQLAlchemy wraps it), first lines only."""
    inner = getattr(err, "orig", None) or err
    text = " ".join(str(inner).strip().splitlines()[:3])
    return text[:400]


def _columns(keys: list[str], where: str) -> dict[str, int]:
    """column -> position in the result of the history columns (and row_id); a clear error otherwise."""
    names = [str(k).strip().lower() for k in keys]
    wanted = list(HISTORY_COLUMNS) + [ROW_ID]
    twice = sorted({n for n in names if names.count(n) > 1 and n in wanted})
    missing = [c for c in HISTORY_COLUMNS if c not in names]
    unknown = [k for k, n in zip(keys, names, strict=True) if n not in wanted]
    if twice or missing or unknown:
        problems = []
        if missing:
            problems.append(f"missing column(s) {missing}")
        if unknown:
            problems.append(f"unknown column(s) {unknown}")
        if twice:
            problems.append(f"column(s) {twice} more than once")
        raise HistoryQueryError(
            f"{where}: the query returns {list(keys)}: {'; '.join(problems)}. It must return {HISTORY_QUERY_COLUMNS}; "
            f"name the columns with AS (SELECT ship_date AS period_start, ...)."
        )
    return {n: i for i, n in enumerate(names)}


def _row_ids(values, seen: int, where: str) -> np.ndarray:
    """The row_id cells of a chunk as int64 >= 1; a clear error naming the row otherwise."""
    if set(map(type, values)) == {int}:  # an integer column: at C speed
        try:
            ids = pa.array(values, pa.int64())
            if pc.min(ids).as_py() >= 1:
                return ids.to_numpy()
        except OverflowError:
            pass
    for i, v in enumerate(values):
        whole = isinstance(v, int) and not isinstance(v, bool) or isinstance(v, Decimal) and v == v.to_integral_value()
        if not whole or not 1 <= int(v) < 2**63:
            raise HistoryQueryError(
                f"{where}: row {seen + i + 1} of the result has row_id {v!r}; row_id must be a whole number from 1 "
                f"up, unique per row (a key of the table). Fix the query, or leave row_id out to number the rows "
                f"by their place in the result."
            )
    return np.array([int(v) for v in values], dtype=np.int64)


class _Digest:
    """sha256 of the cells read, column by column, the same whatever the chunk size."""

    def __init__(self, columns: int):
        self.parts = [(hashlib.sha256(), hashlib.sha256()) for _ in range(columns)]  # cell lengths, cell bytes

    def update(self, cells: list[pa.Array]) -> None:
        for (sizes, text), col in zip(self.parts, cells, strict=True):
            lengths = np.asarray(pc.binary_length(col), dtype="<i8")
            sizes.update(lengths.tobytes())
            data = col.buffers()[2]  # a fresh array: its cells' bytes from offset 0, one after another
            if data is not None and len(col):
                text.update(memoryview(data)[: int(lengths.sum())])

    def hexdigest(self) -> str:
        return hashlib.sha256("".join(h.hexdigest() for pair in self.parts for h in pair).encode()).hexdigest()


def load_history_query(history: HistoryQuery, inputs: InputsConfig) -> tuple[pd.DataFrame, HistoryFile]:
    """The lines the query returns, as `load_raw_history` gives a file's, and the `HistoryFile` that describes them.

    Raises HistoryQueryError (an InputFileError: the cycle exits 2) when the
    server cannot be reached, the query fails, or it returns other columns or
    bad row ids; the message names the source (URL without its password),
    the config key and what to do. The query runs in a transaction that is
    rolled back, never committed.
    """
    import sqlalchemy as sa
    from sqlalchemy.exc import SQLAlchemyError

    where = f"history query {history.describe()} (inputs.history)"
    engine, secrets = _engine(history)
    wanted = list(HISTORY_COLUMNS)
    tables, bad, ids, digest, seen = [], [], [], _Digest(len(wanted)), 0
    step = "connect"
    try:
        with engine.connect() as conn:
            step = "query"
            opts = conn.execution_options(stream_results=True, yield_per=history.chunk_rows)
            result = opts.execute(sa.text(history.query))  # the dialect escapes '%' for its driver
            if not result.returns_rows:
                raise HistoryQueryError(f"{where}: the query returns no rows at all (is it a SELECT?)")
            position = _columns(list(result.keys()), where)
            while rows := result.fetchmany(history.chunk_rows):
                columns = list(zip(*rows, strict=True))  # the chunk by column
                cells = [_column_text(columns[position[c]]) for c in wanted]
                if ROW_ID in position:
                    source_rows = _row_ids(columns[position[ROW_ID]], seen, where)
                    ids.append(source_rows)
                else:
                    source_rows = np.arange(seen + 1, seen + len(rows) + 1, dtype=np.int64)
                digest.update(cells)
                tables.append(screen_cells(cells, wanted, source_rows, inputs.max_line_bytes, bad))
                seen += len(rows)
            result.close()
    except HistoryQueryError as err:
        raise HistoryQueryError(hide_passwords(str(err), secrets)) from None
    except SQLAlchemyError as err:
        if step == "connect":
            what = (
                f"cannot connect to the history database {history.describe()}: {_first_line(err)}. Check the host, "
                f"port, database, user and password in inputs.history (url, password_env) and that the server "
                f"is up and reachable from here."
            )
        else:
            what = (
                f"{where}: the query failed: {_first_line(err)}. Run it in a SQL client against that database, "
                f"fix inputs.history.query and run again."
            )
        raise HistoryQueryError(hide_passwords(what, secrets)) from None
    finally:
        engine.dispose()
    if ids:
        every = np.concatenate(ids)
        uniq, counts = np.unique(every, return_counts=True)
        if (counts > 1).any():
            twice = uniq[counts > 1]
            raise HistoryQueryError(
                f"{where}: row_id {', '.join(map(str, twice[:5]))}{' ...' if len(twice) > 5 else ''} appear(s) on "
                f"more than one row ({int((counts > 1).sum())} ids); row_id must be unique per row (a key of the "
                f"table)."
            )
    read = text_read(tables, bad, wanted, wanted, list(wanted))
    lines = read.frame
    lines["read_error"] = ""
    if len(read.malformed):
        lines = pd.concat([lines, read.malformed[list(lines.columns)]], ignore_index=True)
        lines = lines.sort_values("source_row", kind="stable", ignore_index=True)
    lines.insert(0, "source_file", history.source)
    described = HistoryFile(
        path=Path(history.source), rows=len(lines), sha256=digest.hexdigest(), malformed=len(read.malformed)
    )
    return lines, described
