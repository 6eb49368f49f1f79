"""Months, cycles, horizons and lags.

A planning cycle is named by a month ``C`` ("2027-03").  Order history is
known up to and including month ``C``; the cycle plans the ``horizon`` months
``C+1 … C+horizon``.  The lag of a period ``P`` is ``P − C`` in months, so the
first planned month is lag 1.  Library frames carry months as "YYYY-MM"
strings; arithmetic goes through the integer month index ``year*12 + month-1``.
"""

from __future__ import annotations

import re

import numpy as np
import pandas as pd

MONTH_PATTERN = re.compile(r"^(\d{4})-(0[1-9]|1[0-2])$")

#: Default lag buckets: (label, first lag, last lag); None means open-ended.
DEFAULT_LAG_BUCKETS: tuple[tuple[str, int, int | None], ...] = (
    ("1", 1, 1),
    ("2-3", 2, 3),
    ("4-6", 4, 6),
    ("7+", 7, None),
)


def is_month(text: str) -> bool:
    """True when ``text`` is a well-formed "YYYY-MM" month."""
    return bool(MONTH_PATTERN.match(str(text).strip()))


def month_index(month: str) -> int:
    """Integer index of a "YYYY-MM" month; raises ValueError when malformed."""
    match = MONTH_PATTERN.match(str(month).strip())
    if not match:
        raise ValueError(f"not a month in YYYY-MM form: {month!r}")
    return int(match.group(1)) * 12 + int(match.group(2)) - 1


def month_name(index: int) -> str:
    """The "YYYY-MM" text of an integer month index."""
    year, month0 = divmod(int(index), 12)
    return f"{year:04d}-{month0 + 1:02d}"


def month_indexes(months: pd.Series) -> np.ndarray:
    """Vectorised :func:`month_index` for a Series of well-formed months (each distinct month parsed once)."""
    codes, uniques = pd.factorize(pd.Series(months).astype(str), sort=False)
    text = pd.Series(uniques, dtype=object).astype(str)
    parsed = text.str.slice(0, 4).astype(int).to_numpy() * 12 + text.str.slice(5, 7).astype(int).to_numpy() - 1
    return parsed[codes] if len(parsed) else np.zeros(len(codes), dtype=int)


def month_names(indexes) -> np.ndarray:
    """Vectorised :func:`month_name` (each distinct index formatted once)."""
    idx = np.asarray(indexes, dtype=int)
    uniques, codes = np.unique(idx, return_inverse=True)
    names = np.array([month_name(u) for u in uniques], dtype=object)
    return names[codes.reshape(idx.shape)] if idx.size else np.array([], dtype=object)


def shift_month(month: str, months: int) -> str:
    """The month ``months`` after ``month`` (negative goes back)."""
    return month_name(month_index(month) + months)


def horizon_months(cycle: str, horizon: int) -> list[str]:
    """The months a cycle plans: ``cycle+1 … cycle+horizon``."""
    start = month_index(cycle)
    return [month_name(start + h) for h in range(1, horizon + 1)]


def month_range(first: str, last: str) -> list[str]:
    """Every month from ``first`` to ``last`` inclusive."""
    return [month_name(i) for i in range(month_index(first), month_index(last) + 1)]


def lags(cycles: pd.Series, periods: pd.Series) -> np.ndarray:
    """Lag in months of each period against its cycle (vectorised)."""
    return month_indexes(periods) - month_indexes(cycles)


def lag_bucket_labels(lag_values, buckets=DEFAULT_LAG_BUCKETS) -> np.ndarray:
    """Label each lag with its bucket ("1", "2-3", "4-6", "7+"); lags below 1 get ""."""
    lag_arr = np.asarray(lag_values, dtype=int)
    out = np.full(lag_arr.shape, "", dtype=object)
    for label, first, last in buckets:
        upper = np.iinfo(int).max if last is None else last
        out[(lag_arr >= first) & (lag_arr <= upper)] = label
    return out
