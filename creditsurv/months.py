"""Calendar months as integers.

A calendar month is held inside creditsurv as an integer index
``year * 12 + (month - 1)`` so that month arithmetic (gaps, lags, ages) is plain
integer arithmetic, in numpy and in SQL alike. Text form is ``YYYY-MM``.
"""

from __future__ import annotations

import datetime as _dt
import re

_MONTH_RE = re.compile(r"^(\d{4})-(\d{2})(?:-(\d{2}))?$")


def parse_month(value) -> int:
    """Return the month index of ``value``.

    Parameters
    ----------
    value : str, datetime.date or int
        ``"YYYY-MM"`` (or ``"YYYY-MM-DD"``, day ignored), a date, or an index.

    Raises
    ------
    ValueError
        When ``value`` is not a month.
    """
    if isinstance(value, bool):
        raise ValueError(f"{value!r} is not a month; write it as YYYY-MM")
    if isinstance(value, int):
        return value
    if isinstance(value, _dt.date):
        return value.year * 12 + value.month - 1
    if isinstance(value, str):
        m = _MONTH_RE.match(value.strip())
        if m and 1 <= int(m.group(2)) <= 12:
            return int(m.group(1)) * 12 + int(m.group(2)) - 1
    raise ValueError(f"{value!r} is not a month; write it as YYYY-MM")


def format_month(index: int) -> str:
    """Return ``YYYY-MM`` for a month index."""
    year, month0 = divmod(int(index), 12)
    return f"{year:04d}-{month0 + 1:02d}"


def month_to_date(index: int) -> _dt.date:
    """Return the first day of the month with the given index."""
    year, month0 = divmod(int(index), 12)
    return _dt.date(year, month0 + 1, 1)



def month_ranges(months) -> str:
    """``2025-01..2025-03, 2025-07`` for a set of month indices (at most 6 runs shown)."""
    months = sorted({int(m) for m in months})
    runs, start, prev = [], None, None
    for m in months:
        if start is None:
            start = prev = m
        elif m == prev + 1:
            prev = m
        else:
            runs.append((start, prev))
            start = prev = m
    if start is not None:
        runs.append((start, prev))
    text = [format_month(a) if a == b else f"{format_month(a)}..{format_month(b)}" for a, b in runs[:6]]
    if len(runs) > 6:
        text.append(f"... ({len(runs) - 6} more runs)")
    return ", ".join(text)
