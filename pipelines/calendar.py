"""The planning calendar: periods identified by their start date.

A week starts on its ISO Monday; a month on its first day. Periods are also
numbered by an integer ordinal (weeks or months since 1970-01) so that window
and horizon arithmetic is integer arithmetic on whole columns.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd

from pipelines.config import LATEST_COMPLETE_PERIOD, PeriodKind
from pipelines.errors import ConfigError

_EPOCH_MONDAY = np.datetime64("1969-12-29", "D")  # the ISO Monday on or before 1970-01-01


def period_start(dates: pd.Series, period: PeriodKind) -> pd.Series:
    """The start of the period containing each date (datetime64[ns] in, out)."""
    d = pd.to_datetime(dates)
    if period == "week":
        return (d - pd.to_timedelta(d.dt.weekday, unit="D")).dt.normalize()
    return d.dt.to_period("M").dt.to_timestamp()


WEEK_NS = 7 * 86_400 * 10**9
EPOCH_MONDAY_NS = int(_EPOCH_MONDAY.astype("datetime64[ns]").astype(np.int64))


def period_ordinal(starts: pd.Series | pd.DatetimeIndex, period: PeriodKind) -> np.ndarray:
    """Integer index of each period start: consecutive periods differ by exactly 1."""
    values = pd.DatetimeIndex(starts).values
    if period == "week" and values.dtype == "datetime64[ns]" and not np.isnat(values).any():
        # the same floor divisions on the nanoseconds, without casting to days first (a tenth of the time)
        return (values.view(np.int64) - EPOCH_MONDAY_NS) // WEEK_NS
    values = values.astype("datetime64[D]")
    if period == "week":
        return ((values - _EPOCH_MONDAY).astype(np.int64) // 7).astype(np.int64)
    months = values.astype("datetime64[M]").astype(np.int64)
    return months.astype(np.int64)


def ordinal_to_start(ordinals: np.ndarray, period: PeriodKind) -> pd.DatetimeIndex:
    """Inverse of `period_ordinal`."""
    ordinals = np.asarray(ordinals, dtype=np.int64)
    if period == "week":
        days = _EPOCH_MONDAY + (ordinals * 7).astype("timedelta64[D]")
        return pd.DatetimeIndex(days.astype("datetime64[ns]"))
    return pd.DatetimeIndex(ordinals.astype("datetime64[M]").astype("datetime64[ns]"))


def is_period_start(day: dt.date, period: PeriodKind) -> bool:
    return day.weekday() == 0 if period == "week" else day.day == 1


def resolve_cycle_date(
    setting: dt.date | str, last_history_start: pd.Timestamp | None, period: PeriodKind, source: str
) -> pd.Timestamp:
    """The cycle date: the first period to forecast.

    `latest_complete_period` means the period after the latest period that has
    any history; the loader is expected to deliver complete periods only.
    """
    if setting == LATEST_COMPLETE_PERIOD:
        if last_history_start is None:
            raise ConfigError(
                f"{source}: calendar.cycle_date is {LATEST_COMPLETE_PERIOD!r} but the history holds "
                f"no usable row; give an explicit ISO date or load history."
            )
        return shift_periods(pd.Timestamp(last_history_start), 1, period)
    day = setting if isinstance(setting, dt.date) else dt.date.fromisoformat(str(setting))
    if not is_period_start(day, period):
        first = "a Monday" if period == "week" else "the first day of a month"
        raise ConfigError(
            f"{source}: calendar.cycle_date {day.isoformat()} does not start a {period}; "
            f"give {first}, or {LATEST_COMPLETE_PERIOD!r}."
        )
    return pd.Timestamp(day)


def shift_periods(start: pd.Timestamp, n: int, period: PeriodKind) -> pd.Timestamp:
    """The period start `n` periods after (negative: before) `start`."""
    ordinal = period_ordinal(pd.DatetimeIndex([start]), period)[0] + n
    return ordinal_to_start(np.array([ordinal]), period)[0]


def horizon_starts(cycle_date: pd.Timestamp, horizon: int, period: PeriodKind) -> pd.DatetimeIndex:
    """The `horizon` period starts from the cycle date on."""
    first = period_ordinal(pd.DatetimeIndex([cycle_date]), period)[0]
    return ordinal_to_start(first + np.arange(horizon), period)


def season_length(period: PeriodKind) -> int:
    return 52 if period == "week" else 12


def span_bounds(frame: pd.DataFrame, period: PeriodKind) -> tuple[np.ndarray, np.ndarray]:
    """First and last period ordinal of each row's `active_from`/`active_to` (NaN = open)."""
    out = []
    for col in ("active_from", "active_to"):
        values = pd.to_datetime(frame[col])
        ords = np.full(len(frame), np.nan)
        ok = values.notna().to_numpy()
        if ok.any():
            ords[ok] = period_ordinal(period_start(values[ok], period), period)
        out.append(ords)
    return out[0], out[1]


def active_mask(from_ord: np.ndarray, to_ord: np.ndarray, ordinal: np.ndarray | int) -> np.ndarray:
    """True where `ordinal` lies inside [from_ord, to_ord]; NaN bounds are open."""
    with np.errstate(invalid="ignore"):
        return (np.isnan(from_ord) | (ordinal >= from_ord)) & (np.isnan(to_ord) | (ordinal <= to_ord))
