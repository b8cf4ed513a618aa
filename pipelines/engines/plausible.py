"""Plausible history: dates as written, and the stretch of periods the history can be trusted on.

Pure rules shared by the history stages and the cycle date (an engine: it knows
no stage and no Dagster):

- `distinct_dates`, `distinct_quantities`: the cells of a history column parsed
  once per distinct cell (`text_codes.codes_of`), reached by the lines' codes.
- `parse_dates`: cells to naive dates; a date-time with a UTC offset keeps the
  date and time as written. `year_outside`: a date-shaped cell whose year
  pandas cannot hold (before 1678, after 2261).
- `trusted_extent`: the first and last period of the trusted history. Periods
  with lines are split into groups wherever more than `gap_periods` periods
  pass without a line; a group at either end holding a single line, or at
  most ISOLATED_SHARE of the lines, is isolated (repeatedly, from each end).
  With `trim_end`, a last period with fewer than SPARSE_PERIOD_SHARE of the
  median lines per period is dropped too, while the lines dropped at that end
  stay within the same bound. So one line dated 1900 or 2099, or a stray line
  in the period after the last complete period, neither moves the cycle date nor
  stretches the history. The shares (1%, 10%) are common practice, no source.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from pipelines.calendar import period_ordinal, period_start
from pipelines.text_codes import codes_of

ISOLATED_SHARE = 0.01  # an end group of at most this share of the lines (or a single line) is isolated
SPARSE_PERIOD_SHARE = 0.10  # a last period with fewer lines than this share of the median period is not complete


# a date and time with a UTC offset or Z, e.g. 2026-03-02T10:00:00+02:00: the date and time as written are kept
_WITH_OFFSET = r"^(\d{4}-\d{2}-\d{2}[T ]\d{2}:\d{2}(?::\d{2}(?:\.\d+)?)?)\s*(?:Z|[+-]\d{2}(?::?\d{2})?)$"
_HAS_OFFSET = _WITH_OFFSET.replace("^(", "^(?:", 1)
_DATE_SHAPE = r"^(\d{4})-(\d{1,2})-(\d{1,2})(?:$|[T ])"


def parse_dates(text: pd.Series) -> pd.Series:
    """Dates as written, parsed to naive datetime64[ns] (NaT where a cell is not a date).

    ISO dates (`YYYY-MM-DD`) take a fast path; the rest are read as ISO 8601.
    A date-time with a UTC offset (`...T10:00:00+02:00`, `...Z`) keeps the
    local date and time as written and drops the offset: a line belongs to the
    day it was written for, not to the UTC day, and a mix of offsets never
    raises. Dates outside 1678-2261 (pandas' range) are NaT; see `year_outside`.
    """
    text = pd.Series(text)
    dates = pd.to_datetime(text, format="%Y-%m-%d", errors="coerce")
    nat = dates.isna().to_numpy()
    rest = nat & (text.fillna("") != "").to_numpy() if nat.any() else nat
    if rest.any():
        other = text[rest].astype(str).str.replace(_WITH_OFFSET, r"\1", regex=True)
        try:
            parsed = pd.to_datetime(other, format="ISO8601", errors="coerce")
        except (ValueError, TypeError, OverflowError):
            parsed = other.map(_one_date)
        if getattr(parsed.dtype, "tz", None) is not None or parsed.dtype == object:
            parsed = other.map(_one_date)  # an offset the pattern did not catch: read each cell alone
        dates = dates.astype("datetime64[ns]")
        dates[rest] = pd.to_datetime(parsed, errors="coerce").to_numpy(dtype="datetime64[ns]")
    return dates if dates.dtype == "datetime64[ns]" else dates.astype("datetime64[ns]")


def _one_date(cell: str) -> pd.Timestamp:
    try:
        day = pd.Timestamp(cell)
    except (ValueError, TypeError, OverflowError):
        return pd.NaT
    if day is pd.NaT:
        return pd.NaT
    return day.tz_localize(None) if day.tzinfo is not None else day


def year_outside(text: pd.Series, first: int = 1678, last: int = 2261) -> np.ndarray:
    """-1 / +1 where a cell is shaped like a date (YYYY-MM-DD) with a year before `first` / after `last`, else 0.

    Such a date cannot be held as datetime64[ns]; it is still a date, so it is
    rejected as outside the plausible window rather than as unreadable.
    """
    parts = pd.Series(text, dtype=object).fillna("").astype(str).str.extract(_DATE_SHAPE)
    year = pd.to_numeric(parts[0], errors="coerce")
    month = pd.to_numeric(parts[1], errors="coerce")
    day = pd.to_numeric(parts[2], errors="coerce")
    shaped = month.between(1, 12) & day.between(1, 31)
    return np.where(shaped & (year < first), -1, np.where(shaped & (year > last), 1, 0))


def normalize_dates(frame: pd.DataFrame, columns: tuple[str, ...]) -> pd.DataFrame:
    """Master data: date cells with a UTC offset rewritten as the date and time written, the rest untouched.

    The stage's pandera model parses the dates; a cell that is no date stays as
    written, so the schema check shows it.
    """
    out = frame.copy()
    for c in columns:
        if c not in out.columns:
            continue
        cells = out[c]
        text = cells.where(cells.notna(), "").astype(str)
        has_offset = text.str.contains(_HAS_OFFSET, regex=True)
        if has_offset.any():
            out.loc[has_offset, c] = text[has_offset].str.replace(_WITH_OFFSET, r"\1", regex=True)
    return out


def trusted_extent(
    ordinals: np.ndarray, gap_periods: int, *, trim_end: bool = True, counts: np.ndarray | None = None
) -> tuple[int | None, int | None]:
    """First and last period ordinal of the trusted history of lines at `ordinals` (None, None when empty);
    with `counts`, `ordinals` are the distinct periods, ascending, and `counts` the lines of each.

    The rules of the module docstring: isolated end groups (split at gaps longer
    than `gap_periods`) go at both ends; with `trim_end`, sparse last periods
    go too. Vectorised over the distinct periods.
    """
    if len(ordinals) == 0:
        return None, None
    ordinals = np.asarray(ordinals)  # any integer type as given (no copy of the lines' ordinals)
    if counts is not None:
        periods = ordinals
    else:
        periods, counts = _period_counts(ordinals if ordinals.dtype.kind in "iu" else ordinals.astype(np.int64))
    limit = max(1.0, ISOLATED_SHARE * counts.sum())
    breaks = np.flatnonzero(np.diff(periods) > gap_periods)  # a gap after periods[b]
    lo, hi = 0, len(periods) - 1
    cum = np.concatenate(([0], np.cumsum(counts)))
    dropped_lo = dropped_hi = 0
    # from the start: the first group ends at the first break at or after lo
    for b in breaks:
        if b < lo or b >= hi:
            continue
        lines = cum[b + 1] - cum[lo]
        if dropped_lo + lines > limit:
            break
        dropped_lo += lines
        lo = b + 1
    if trim_end:
        for b in breaks[::-1]:
            if b + 1 > hi or b < lo:
                continue
            lines = cum[hi + 1] - cum[b + 1]
            if dropped_hi + lines > limit:
                break
            dropped_hi += lines
            hi = b
        median = float(np.median(counts[lo : hi + 1]))
        while hi > lo and counts[hi] < SPARSE_PERIOD_SHARE * median and dropped_hi + counts[hi] <= limit:
            dropped_hi += counts[hi]
            hi -= 1
    return int(periods[lo]), int(periods[hi])


def _period_counts(ordinals: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """`np.unique(ordinals, return_counts=True)`, counted over the range of the periods (no sort of the
    lines) when the range is not much longer than the lines."""
    low, high = int(ordinals.min()), int(ordinals.max())
    if high - low > 4 * len(ordinals) + 1_000_000:
        return np.unique(ordinals, return_counts=True)
    counts = np.bincount(ordinals - low, minlength=high - low + 1)
    periods = np.flatnonzero(counts)
    return periods + low, counts[periods]


def gap_periods(years: float, period: str) -> int:
    """`years` (inputs.plausible.isolation_gap_years) in periods of the calendar, at least 1."""
    per_year = 52 if period == "week" else 12
    return max(1, int(np.ceil(years * per_year)))


@dataclass(frozen=True)
class DistinctDates:
    """The date cells of the lines coded by their distinct text (`text_codes.codes_of`); each rule of a date
    judged once per distinct cell. The last slot stands for a missing cell (no date, not outside the window)."""

    code: np.ndarray  # per line: its distinct cell
    value: np.ndarray  # per distinct cell: the date (`parse_dates`), datetime64[ns], NaT where none
    value_nat: np.ndarray  # per distinct cell: no date
    outside: np.ndarray  # per distinct cell: `year_outside` where no date, else 0
    value_code: np.ndarray  # per distinct cell: equal exactly where the dates are (NaT one code)

    def take(self, per_cell: np.ndarray) -> np.ndarray:
        return per_cell[self.code]

    def period_counts(self, ordinals: np.ndarray, lines: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(the distinct periods, ascending, and the lines of each) of the lines `lines` (bool per line), given
        the period ordinal of each distinct cell: `np.unique(per-line ordinals[lines], return_counts=True)`,
        counted per distinct cell first (no array of the lines' ordinals)."""
        per_cell = np.bincount(self.code[lines], minlength=len(ordinals))
        held = np.flatnonzero(per_cell)
        periods, at = np.unique(ordinals[held], return_inverse=True)
        counts = np.zeros(len(periods), dtype=np.int64)
        np.add.at(counts, at, per_cell[held])
        return periods, counts

    def ordinals(self, period: str) -> np.ndarray:
        """Period ordinal of each distinct date (0 where none)."""
        out = np.zeros(len(self.value), dtype=np.int64)
        if (~self.value_nat).any():
            days = pd.Series(self.value[~self.value_nat])
            out[~self.value_nat] = period_ordinal(period_start(days, period), period)
        return out


def distinct_dates(text: pd.Series) -> DistinctDates:
    """`parse_dates` and `year_outside` of each distinct cell of `text` (a missing cell: no date, not outside)."""
    code, cells = codes_of(text)
    code[code < 0] = len(cells)  # in place: the codes are this function's own
    parsed = parse_dates(pd.Series(cells, dtype=text.dtype)).to_numpy(dtype="datetime64[ns]")
    value = np.append(parsed, np.datetime64("NaT", "ns"))
    nat = np.isnat(value)
    outside = np.zeros(len(value), dtype=np.int64)
    if nat[:-1].any():
        outside[:-1][nat[:-1]] = year_outside(pd.Series(cells[nat[:-1]], dtype=text.dtype))
    return DistinctDates(code, value, nat, outside, pd.factorize(value.view(np.int64))[0])


def distinct_quantities(text: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    """(code per line, parsed quantity per code): `pd.to_numeric(errors="coerce")` on the distinct cells only,
    a missing cell among them when the column has one (so the parse sees the same kinds of cells)."""
    code, cells = codes_of(text)
    missing = code < 0
    if missing.any():
        cells = np.append(cells, None)
        code = np.where(missing, len(cells) - 1, code)
    parsed = pd.to_numeric(pd.Series(cells, dtype=text.dtype if not missing.any() else object), errors="coerce")
    return code, parsed.to_numpy(dtype=float, na_value=np.nan)
