"""The period of a close: one calendar month, written ``YYYY-MM``.

One type for every place that names a month (the CLI's ``--period``, the ``movements/<YYYY-MM>/``
folders, the ledger, book stock's cut-off), built on pandas' monthly period so that month
arithmetic is pandas' and not ours.

Examples
--------
>>> p = Period.parse("2026-10")
>>> str(p), str(p.previous()), str(p.next())
('2026-10', '2026-09', '2026-11')
>>> Period.parse("2027-01").previous()
Period('2026-12')
>>> p.bounds("Europe/Berlin")
(Timestamp('2026-09-30 22:00:00+0000', tz='UTC'), Timestamp('2026-10-31 23:00:00+0000', tz='UTC'))
>>> Period.parse("2026-13")
Traceback (most recent call last):
...
ValueError: period '2026-13' is not a month YYYY-MM: month 13 does not exist
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from datetime import date
from zoneinfo import ZoneInfo

import pandas as pd

__all__ = ["Period"]

_FORM = re.compile(r"^(\d{4})-(\d{2})$")


@dataclass(frozen=True, order=True)
class Period:
    """One calendar month; compares, hashes and sorts as the month it names.

    Build it with :meth:`parse` (from ``YYYY-MM`` text) or :meth:`of` (the month a date falls
    in); ``str(period)`` gives the text back.
    """

    year: int
    month: int

    def __post_init__(self) -> None:
        if not 1 <= self.month <= 12:
            raise ValueError(f"month {self.month} does not exist")
        if not 1 <= self.year <= 9999:
            raise ValueError(f"year {self.year} is out of range")

    @classmethod
    def parse(cls, text: object) -> Period:
        """The period written ``YYYY-MM``; a :class:`Period` is returned as it is.

        Raises
        ------
        ValueError
            When ``text`` is not of that form or names no month (``2026-13``, ``2026-00``).
        """
        if isinstance(text, Period):
            return text
        match = _FORM.match(text) if isinstance(text, str) else None
        if match is None:
            raise ValueError(f"period {text!r} is not a month YYYY-MM")
        year, month = int(match.group(1)), int(match.group(2))
        if not 1 <= month <= 12:
            raise ValueError(f"period {text!r} is not a month YYYY-MM: month {month} does not exist")
        if year < 1:
            raise ValueError(f"period {text!r} is not a month YYYY-MM: year {year} does not exist")
        return cls(year, month)

    @classmethod
    def is_period(cls, text: object) -> bool:
        """Whether ``text`` is a valid ``YYYY-MM`` (for sorting folder names without raising)."""
        try:
            cls.parse(text)
        except ValueError:
            return False
        return True

    @classmethod
    def of(cls, day: date | pd.Timestamp) -> Period:
        """The month ``day`` falls in (a local date: convert instants to the site's zone first)."""
        return cls(day.year, day.month)

    @property
    def _pandas(self) -> pd.Period:
        return pd.Period(year=self.year, month=self.month, freq="M")

    def previous(self) -> Period:
        """The month before."""
        p = self._pandas - 1
        return Period(p.year, p.month)

    def next(self) -> Period:
        """The month after."""
        p = self._pandas + 1
        return Period(p.year, p.month)

    def first_day(self) -> date:
        """The first calendar day of the month."""
        return date(self.year, self.month, 1)

    def last_day(self) -> date:
        """The last calendar day of the month."""
        return self._pandas.end_time.date()

    def bounds(self, timezone: str | ZoneInfo) -> tuple[pd.Timestamp, pd.Timestamp]:
        """First and last instant of the month in the site's time zone, as UTC.

        A month closes at local midnight: for 2026-10 in Europe/Berlin that is
        2026-09-30T22:00Z (CEST, UTC+2) to 2026-10-31T23:00Z (CET, UTC+1); the daylight-saving
        change on 25 October moves the end by an hour.
        """
        tz = timezone if isinstance(timezone, ZoneInfo) else ZoneInfo(str(timezone))
        start = pd.Timestamp(self.first_day()).tz_localize(tz)
        end = pd.Timestamp(self.next().first_day()).tz_localize(tz)
        return start.tz_convert("UTC"), end.tz_convert("UTC")

    def __str__(self) -> str:
        return f"{self.year:04d}-{self.month:02d}"

    def __repr__(self) -> str:
        return f"Period('{self}')"
