"""The `inputs` section of the planning config: where the inputs are, how they are read, what is plausible.

A frozen pydantic model that forbids unknown keys, beside the other sections
(`pipelines.config_sections`; kept apart so that neither module passes 400
lines). The reader (`pipelines.engines.reader`) takes `encoding` and
`max_line_bytes`; cleaned_history's rejection rules and the cycle date take
`plausible` (`pipelines.engines.plausible`). `history`, when given, reads the
history from a database by one SQL query instead of the folder's history files
(`pipelines.engines.history_database`): its URL, dialect and driver are checked
here, once, so a bad URL stops at loading the config, never in a run; whether
the server answers and the query runs is known only when the history is read.
Assembled in `pipelines.config`.
"""

from __future__ import annotations

import codecs
from pathlib import Path

from pydantic import Field, field_validator, model_validator

from pipelines.config_sections import Frozen
from pipelines.errors import hide_passwords


class PlausibilityConfig(Frozen):
    """Bounds a history line must lie within (pipelines/stages/cleaned_history.py); a line outside is rejected.

    The defaults are wide on purpose (common practice, no source): they catch
    typing slips such as a year 1900 or 2099 or a quantity of 1e12, never a
    real shipment.
    """

    years_before_cycle: float = Field(
        10,
        gt=0,
        le=200,
        description="a line dated more than this many years before the cycle date is rejected as date_before_window",
    )
    years_after_cycle: float = Field(
        2,
        gt=0,
        le=200,
        description="a line dated this many years or more after the cycle date is rejected as date_after_window "
        "(closer lines are on_or_after_cycle_date: kept for a later cycle)",
    )
    max_abs_quantity: float = Field(
        1e9,
        gt=0,
        description="a line whose quantity is larger than this in absolute value is rejected as "
        "quantity_out_of_bounds",
    )
    isolation_gap_years: float = Field(
        1.0,
        gt=0,
        le=200,
        description="lines at the start or end of the history cut off from the rest by a gap longer than this, "
        "holding a single line or at most 1% of the lines, set neither the cycle date nor the start of the "
        "history; they are rejected as isolated_date",
    )


HISTORY_QUERY_COLUMNS = "product, site, customer, period_start, quantity (and optionally row_id)"


class HistoryQuery(Frozen):
    """The history from a database: one SQL query instead of the `history*` files of the input folder.

    The query returns one row per history line with the columns product,
    site, customer, period_start and quantity, and optionally row_id: a
    whole number >= 1 unique per row (a key of the table) that rejected rows
    then name; without it a row is named by its place in the result, so give
    the query an ORDER BY. Any column type is read as text as written.
    """

    url: str = Field(
        description="SQLAlchemy database URL dialect+driver://user@host:port/database, e.g. "
        "postgresql+psycopg://planner@db.example:5432/sales; keep the password out of it (password_env)"
    )
    query: str = Field(min_length=1, description="the SQL query that returns the history lines")
    password_env: str | None = Field(
        None, min_length=1, description="name of the environment variable that holds the password (never printed)"
    )
    source: str = Field(
        "history_query",
        min_length=1,
        description="what rejected rows name as their source (the column source_file of raw_history and "
        "rejected_rows), beside the row id",
    )
    chunk_rows: int = Field(50_000, ge=1, le=10_000_000, description="rows fetched at a time (bounds the memory)")

    @field_validator("url")
    @classmethod
    def _database_url(cls, v: str) -> str:
        from sqlalchemy.engine import make_url
        from sqlalchemy.exc import ArgumentError, NoSuchModuleError

        example = "e.g. postgresql+psycopg://planner@db.example:5432/sales"
        try:
            url = make_url(v)
        except (ArgumentError, ValueError):
            raise ValueError(
                f"not a database URL; write dialect+driver://user@host:port/database ({example})"
            ) from None
        try:
            dialect = url.get_dialect()
        except NoSuchModuleError:
            raise ValueError(
                f"no database dialect or driver {url.drivername!r} is installed; use postgresql+psycopg "
                f"({example}), or install the SQLAlchemy dialect of your database"
            ) from None
        try:
            dialect.import_dbapi()
        except ImportError as err:
            raise ValueError(
                f"the driver {url.get_driver_name()!r} of {url.get_backend_name()} is not installed ({err}); "
                f"pip install 'apportion[database]' installs psycopg for postgresql+psycopg://, or install the "
                f"driver the URL names"
            ) from None
        return v

    @field_validator("query")
    @classmethod
    def _one_statement(cls, v: str) -> str:
        v = v.strip().rstrip(";").strip()
        if not v:
            raise ValueError(f"the query is empty; write a SELECT that returns {HISTORY_QUERY_COLUMNS}")
        return v

    @model_validator(mode="after")
    def _one_password(self) -> HistoryQuery:
        from sqlalchemy.engine import make_url

        if self.password_env and make_url(self.url).password is not None:
            raise ValueError(
                f"url {hide_passwords(self.url)} holds a password and password_env names {self.password_env}; "
                f"give it one way (password_env keeps it out of the file)"
            )
        return self

    def describe(self) -> str:
        """The source for messages and metadata: the query's source name and the URL without its password."""
        from sqlalchemy.engine import make_url

        return f"{self.source} ({make_url(self.url).render_as_string(hide_password=True)})"


class InputsConfig(Frozen):
    """Where the input files are (relative paths are taken from the working directory) and how they are read."""

    folder: Path = Path("data/demo")
    encoding: str = Field(
        "utf-8",
        description="text encoding of the CSV inputs, e.g. utf-8 (with or without BOM), latin-1, cp1252, utf-16",
    )
    max_line_bytes: int = Field(
        65536,
        ge=256,
        le=1 << 30,
        description="a CSV line (or Parquet cell) longer than this many bytes is rejected as line_too_long, "
        "never held whole",
    )
    plausible: PlausibilityConfig = PlausibilityConfig()
    history: HistoryQuery | None = Field(
        None,
        description="the history from a database by one SQL query; blank: the history*.csv|parquet files of folder",
    )

    @field_validator("encoding")
    @classmethod
    def _known_encoding(cls, v: str) -> str:
        try:
            codecs.lookup(v)
        except LookupError:
            raise ValueError(f"{v!r} is not a known text encoding; use e.g. utf-8, latin-1, cp1252 or utf-16") from None
        return v
