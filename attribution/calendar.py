"""The evaluation calendar: periods defined by the sorted ``period_end`` dates of index_returns.

Period t runs from ``period_end[t-1]`` to ``period_end[t]``; the first period starts one
regular period before the first ``period_end`` (DESIGN §2). The frequency is inferred from the
median spacing of the dates and also gives the periods per year used to annualise.
"""

from __future__ import annotations

import datetime as dt
import itertools
from dataclasses import dataclass

import polars as pl

from attribution.errors import SharedTableError

#: (label, periods per year, inclusive range of the median gap in days)
_FREQUENCIES = (
    ("day", 252, (1, 4)),
    ("week", 52, (5, 9)),
    ("month", 12, (26, 35)),
    ("quarter", 4, (85, 96)),
    ("half-year", 2, (175, 190)),
    ("year", 1, (360, 370)),
)


@dataclass(frozen=True)
class Calendar:
    """Sorted period ends, the first period's start, and the inferred frequency."""

    period_ends: tuple[dt.date, ...]
    first_start: dt.date
    frequency: str
    periods_per_year: int

    @property
    def n_periods(self) -> int:
        return len(self.period_ends)

    def frame(self) -> pl.DataFrame:
        """One row per period: ``period_index``, ``period_start``, ``period_end``."""
        ends = list(self.period_ends)
        starts = [self.first_start, *ends[:-1]]
        return pl.DataFrame(
            {
                "period_index": list(range(len(ends))),
                "period_start": starts,
                "period_end": ends,
            },
            schema={"period_index": pl.Int32, "period_start": pl.Date, "period_end": pl.Date},
        )


def align_dates(column: str, align: str) -> pl.Expr:
    """Map a date to its calendar month end (``month``) or quarter end (``quarter``).

    Business-day period ends (the last trading day) and calendar month ends are the usual
    mismatch between a custodian's holdings file and an index provider's returns.
    """
    col = pl.col(column)
    if align == "month":
        return col.dt.month_end()
    if align == "quarter":
        return col.dt.truncate("1q").dt.offset_by("2mo").dt.month_end()
    return col


def _is_month_end(day: dt.date) -> bool:
    return (day + dt.timedelta(days=1)).day == 1


def _months_back(day: dt.date, months: int) -> dt.date:
    """The same day ``months`` earlier, or that month's end when ``day`` is a month end."""
    month0 = day.year * 12 + day.month - 1 - months
    year, month = divmod(month0, 12)
    month += 1
    if _is_month_end(day):
        nxt = dt.date(year + (month == 12), month % 12 + 1, 1)
        return nxt - dt.timedelta(days=1)
    last = (dt.date(year + (month == 12), month % 12 + 1, 1) - dt.timedelta(days=1)).day
    return dt.date(year, month, min(day.day, last))


def build_calendar(period_end: pl.Series) -> Calendar:
    """Infer the calendar from the distinct ``period_end`` dates of index_returns.

    Rule (common practice, no source): the median gap between consecutive dates picks the
    frequency; a single date is read as one month. The first period's start is one regular
    period before the first date (a month end maps to the previous month end).
    """
    ends = sorted(set(period_end.drop_nulls().to_list()))
    if not ends:
        msg = "index_returns: no rows; at least one period_end is needed to define the calendar."
        raise SharedTableError(msg)
    if len(ends) == 1:
        label, per_year = "month", 12
    else:
        gaps = sorted((b - a).days for a, b in itertools.pairwise(ends))
        median = gaps[len(gaps) // 2]
        found = [(lab, ppy) for lab, ppy, (lo, hi) in _FREQUENCIES if lo <= median <= hi]
        if not found:
            msg = (
                f"index_returns: cannot infer the calendar frequency from period_end (median "
                f"gap {median} days); expected daily, weekly, monthly, quarterly, half-yearly "
                "or yearly dates."
            )
            raise SharedTableError(msg)
        label, per_year = found[0]
    first = ends[0]
    step_months = {"month": 1, "quarter": 3, "half-year": 6, "year": 12}
    if label in step_months:
        start = _months_back(first, step_months[label])
    else:
        start = first - dt.timedelta(days=7 if label == "week" else 1)
    return Calendar(tuple(ends), start, label, per_year)
