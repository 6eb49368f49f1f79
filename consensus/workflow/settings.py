"""Settings of a store: the company name the pack prints and the limits intake holds files to.

Every setting has a default; a store keeps only what was changed.  Limits are
checked when a setting is set (a number where a number is meant), so a file
is never judged against a setting that cannot be read.
"""

from __future__ import annotations

from dataclasses import dataclass

import pandas as pd

from consensus.errors import ConsensusError
from consensus.store.db import session_scope
from consensus.store.models import Setting


@dataclass(frozen=True)
class SettingKind:
    key: str
    default: str
    meaning: str
    number: bool = False
    whole: bool = False  # a whole number of 0 or more (a count, e.g. of months)


SETTINGS: tuple[SettingKind, ...] = (
    SettingKind("company", "Demand review", "company name printed on the meeting pack"),
    SettingKind("limit.max_quantity", "1e9", "largest quantity a forecast, event or order file may hold (units)",
                number=True),
    SettingKind("limit.max_value", "1e12", "largest money value a forecast file may hold", number=True),
    SettingKind("limit.max_unit_price", "1e7", "largest unit price an items file may hold", number=True),
    SettingKind("limit.earliest_month", "2000-01", "earliest month an order history file may hold"),
    SettingKind("cycle.frozen_months", "0", "first months of each horizon locked in fill-in workbooks", whole=True),
)
_BY_KEY = {s.key: s for s in SETTINGS}


def _kind(key: str) -> SettingKind:
    if key not in _BY_KEY:
        raise ConsensusError(f"unknown setting {key!r}; settings are {', '.join(_BY_KEY)}")
    return _BY_KEY[key]


def get_setting(session, key: str) -> str:
    row = session.get(Setting, key)
    return row.value if row is not None else _kind(key).default


def frozen_months(session) -> int:
    """How many months at the start of each cycle's horizon are frozen (setting ``cycle.frozen_months``, default 0)."""
    return int(get_setting(session, "cycle.frozen_months"))


def set_setting(key: str, value: str, *, url=None) -> str:
    kind = _kind(key)
    if kind.whole:
        text = str(value).strip()
        if not (text.isascii() and text.isdigit()) or int(text) > 60:
            raise ConsensusError(f"{key} takes a whole number from 0 to 60, not {value!r}")
        value = str(int(text))
    elif kind.number:
        try:
            number = float(value)
        except ValueError:
            raise ConsensusError(f"{key} takes a number, not {value!r}") from None
        if not number > 0 or number == float("inf"):
            raise ConsensusError(f"{key} must be a positive finite number, not {value!r}")
    with session_scope(url) as session:
        row = session.get(Setting, key) or Setting(key=key, value=value)
        row.value = str(value)
        session.add(row)
    return str(value)


def list_settings(*, url=None) -> pd.DataFrame:
    with session_scope(url, write=False) as session:
        values = {s.key: get_setting(session, s.key) for s in SETTINGS}
    return pd.DataFrame({"key": list(values), "value": list(values.values()),
                         "meaning": [s.meaning for s in SETTINGS]})
