"""The `inputs` section of the planning config: where the input files are, how they are read, what is plausible.

A frozen pydantic model that forbids unknown keys, beside the other sections
(`pipelines.config_sections`; kept apart so that neither module passes 400
lines). The reader (`pipelines.engines.reader`) takes `encoding` and
`max_line_bytes`; cleaned_history's rejection rules and the cycle date take
`plausible` (`pipelines.engines.plausible`). Assembled in `pipelines.config`.
"""

from __future__ import annotations

import codecs
from pathlib import Path

from pydantic import Field, field_validator

from pipelines.config_sections import Frozen


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

    @field_validator("encoding")
    @classmethod
    def _known_encoding(cls, v: str) -> str:
        try:
            codecs.lookup(v)
        except LookupError:
            raise ValueError(f"{v!r} is not a known text encoding; use e.g. utf-8, latin-1, cp1252 or utf-16") from None
        return v
