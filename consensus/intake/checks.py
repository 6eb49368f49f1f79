"""Check the rows of a read input file and turn them into clean, typed frames.

Every check takes a :class:`~consensus.intake.reader.RawTable` and returns a
:class:`CheckResult`: the clean rows, the problems found (capped at
``max_problems``, with the full count kept) and warnings.  Checks never raise
for problems in the data; they look at every row, column by column, so one
submission shows the user everything that is wrong at once.  Nothing is
written anywhere: the caller decides to store or reject.

Policy decisions, kept in one place:

* Codes (item, family, location, region) are stripped and matched to the
  master data exactly first; a code that matches only ignoring case is
  accepted when that match is unique and is replaced by the master's
  spelling, with a warning.  For the same reason master files may not hold
  two codes that differ only in case.
* Columns the check does not know are ignored and reported as warnings;
  ``last_consensus`` (the reference column of a template) is ignored quietly.
* Numbers are written with "." as decimal point and no thousands separators;
  "1,5" or "1 000" is a problem, never a guess.
* A forecast row must carry a number: a blank quantity (or value) is a
  problem, so a half-filled template is not taken as zeros or skipped.
* ``clean`` holds only the rows without problems; a caller that must keep a
  file all-or-nothing rejects it whenever ``total_problems`` is not zero.
* Plausible numbers only: every number must be finite and within the
  :class:`IntakeLimits` of its file kind (a quantity of 1e308 is finite, but
  two of them sum to infinity and every later step fails), and order history
  must lie in the months the limits allow (orders cannot come from the
  future, so a forecast given to the actuals load is refused).
* Codes (item, family, location, region, parent, component, event names)
  may not start with "=", "+", "-", "@", a tab or a carriage return: a
  spreadsheet would run them as formulas when the tool writes them out
  (OWASP, "CSV Injection"), and a code cannot be escaped without changing it.
  Free text (notes, descriptions) is kept as received and escaped on the way
  out by :mod:`consensus.outputs`; the one quote that escaping adds before a
  formula character is removed again here, so a returned CSV template reads
  back to the original text.
"""

from __future__ import annotations

import datetime as dt
import difflib
import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from consensus.errors import InputRejected, InvalidSpec, Problem
from consensus.intake.reader import RawTable
from consensus.outputs import looks_like_formula, unescape_formula_text
from consensus.periods import MONTH_PATTERN, is_month, month_index, shift_month

DEFAULT_MAX_PROBLEMS = 50
#: Distinct unknown codes per column given a "did you mean" hint (each hint reads the whole master).
MAX_CODE_HINTS = 20
REFERENCE_COLUMNS = frozenset({"last_consensus"})
WEEK_PATTERN = r"^\d{4}-W(0[1-9]|[1-4]\d|5[0-3])$"
DATE_PATTERN = r"^\d{4}-\d{2}-\d{2}$"
NUMBER_TEXT = "a number written with '.' for decimals and no thousands separators"

FORECAST_COLUMNS = ("cycle", "item", "family", "location", "region", "period", "week", "quantity", "value", "note")
EVENT_COLUMNS = ("cycle", "event", "item", "family", "location", "region", "start", "end", "uplift_pct", "units", "note")
ACTUAL_COLUMNS = ("item", "location", "date", "period", "quantity")
MASTER_COLUMNS = {
    "items": ("item", "family", "unit_price", "description"),
    "locations": ("location", "region", "description"),
    "bom": ("parent", "component", "qty_per", "lead_time_months"),
}
MASTER_REQUIRED = {
    "items": ("item", "family"),
    "locations": ("location", "region"),
    "bom": ("parent", "component", "qty_per", "lead_time_months"),
}
MASTER_OF = {"item": "item", "family": "item", "location": "location", "region": "location"}
FILE_KINDS = ("forecast", "events", "actuals", "items", "locations", "bom")
#: Columns that only a forecast or an events file has; order history with one of them is a misrouted forecast.
FORECAST_ONLY_COLUMNS = ("cycle", "week", "value", "last_consensus", "family", "region", "event", "uplift_pct",
                         "units", "start", "end")
#: Keys of a template's hidden sheet that say the file was made as a forecast template.
TEMPLATE_META_KEYS = ("source", "cycle", "scope")
FORMULA_CODE_TEXT = ("a code that does not start with '=', '+', '-', '@', a tab or a carriage return "
                     "(a spreadsheet would run it as a formula)")


@dataclass(frozen=True)
class IntakeLimits:
    """The largest plausible number of each file kind, and the months order history may fall in.

    A value beyond its limit is refused with its row and column, like any
    other problem; the limits are settings of a store, so a business whose
    numbers are larger raises them.  Defaults, each a round bound far above
    any real figure and far below where floating-point sums lose meaning:

    * quantities in units (forecasts, order history, event units): 10⁹ a
      row, i.e. a billion units of one item at one location in one month;
      2,000,000 such rows still sum exactly in a double (2·10¹⁵ < 2⁵³).
    * money values of a forecast: 10¹² a row; unit prices: 10⁹.
    * event uplifts: at most +10,000 percent (a hundredfold); a launch that
      starts from nothing is given in ``units``.
    * BOM: at most 10⁶ components per parent, lead times of at most 120
      months.
    * order history: months from ``earliest_actual_month`` (1990-01, which
      catches a spreadsheet's zero date 1900-01-00 and two-digit years read as
      the first century) to ``latest_actual_month``; ``None`` means the
      current calendar month, since orders cannot come from the future.
    * events: at most ``event_months_outside_horizon`` (24) months before the
      cycle's horizon starts or after it ends.
    """

    max_forecast_quantity: float = 1e9
    max_forecast_value: float = 1e12
    max_actual_quantity: float = 1e9
    max_event_units: float = 1e9
    max_event_uplift_pct: float = 10_000.0
    max_unit_price: float = 1e9
    max_qty_per: float = 1e6
    max_lead_time_months: int = 120
    earliest_actual_month: str = "1990-01"
    latest_actual_month: str | None = None
    event_months_outside_horizon: int = 24

    def __post_init__(self) -> None:
        for name in ("max_forecast_quantity", "max_forecast_value", "max_actual_quantity", "max_event_units",
                     "max_event_uplift_pct", "max_unit_price", "max_qty_per", "max_lead_time_months"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value) or value <= 0:
                raise InvalidSpec(f"{name} must be a finite number above 0; got {value!r}")
        months = {"earliest_actual_month": self.earliest_actual_month, "latest_actual_month": self.latest_actual_month}
        for name, value in months.items():
            if value is not None and not (isinstance(value, str) and is_month(value)):
                raise InvalidSpec(f"{name} must be a month YYYY-MM; got {value!r}")
        if self.latest_actual_month is not None and self.latest_actual_month < self.earliest_actual_month:
            raise InvalidSpec(f"latest_actual_month {self.latest_actual_month} is before earliest_actual_month "
                              f"{self.earliest_actual_month}")
        outside = self.event_months_outside_horizon
        if isinstance(outside, bool) or not isinstance(outside, int) or outside < 0:
            raise InvalidSpec(f"event_months_outside_horizon must be a whole number of 0 or more; got {outside!r}")

    def actual_months(self, *, today: dt.date | None = None) -> tuple[str, str]:
        """The first and last month order history may fall in; the last is this calendar month unless set."""
        if self.latest_actual_month is not None:
            return self.earliest_actual_month, self.latest_actual_month
        today = today or dt.date.today()
        return self.earliest_actual_month, f"{today.year:04d}-{today.month:02d}"


DEFAULT_LIMITS = IntakeLimits()


@dataclass(frozen=True)
class CheckResult:
    """Outcome of checking one file: clean rows, problems (capped) and their full count."""

    clean: pd.DataFrame
    problems: list[Problem]
    total_problems: int
    warnings: list[Problem] = field(default_factory=list)

    @property
    def is_clean(self) -> bool:
        return self.total_problems == 0

    def raise_if_problems(self, filename: str) -> None:
        """Raise :class:`InputRejected` carrying the problems when there are any."""
        if self.total_problems:
            raise InputRejected(file=filename, problems=list(self.problems), total_problems=self.total_problems)


# ---------------------------------------------------------------------------
# collecting problems without a loop over rows


class _Issues:
    """Problems gathered rule by rule as boolean masks over the frame's rows."""

    def __init__(self, filename: str, rows: np.ndarray):
        self.filename = filename
        self.rows = np.asarray(rows, dtype=int)
        self.parts: list[pd.DataFrame] = []
        self.bad = np.zeros(len(self.rows), dtype=bool)
        self.warnings: list[Problem] = []
        self.file_problems: list[Problem] = []

    def add(self, mask, column, values, expected) -> None:
        """Record one problem for every row where ``mask`` is true.

        ``column``, ``values`` and ``expected`` are each a scalar or a
        per-row array/Series aligned with the frame.
        """
        mask = np.asarray(mask, dtype=bool)
        if not mask.any():
            return
        positions = np.flatnonzero(mask)
        self.bad[positions] = True
        self.parts.append(
            pd.DataFrame(
                {
                    "position": positions,
                    "rule": len(self.parts),
                    "column": _pick(column, positions),
                    "value": _pick(values, positions),
                    "expected": _pick(expected, positions),
                }
            )
        )

    def warn(self, column: str | None, value: str | None, expected: str, row: int | None = None) -> None:
        self.warnings.append(Problem(self.filename, row, column, value, expected))

    def add_file_problem(self, column: str | None, value: str | None, expected: str) -> None:
        """A problem of the whole file (no row), listed before the rows' problems."""
        self.file_problems.append(Problem(self.filename, None, column, value, expected))

    def result(self, clean: pd.DataFrame, max_problems: int) -> CheckResult:
        first = self.file_problems[:max_problems]
        if not self.parts:
            return CheckResult(clean, first, len(self.file_problems), self.warnings[:max_problems])
        found = pd.concat(self.parts, ignore_index=True).sort_values(["position", "rule"], kind="stable")
        shown = found.head(max(0, max_problems - len(first)))
        problems = first + [
            Problem(self.filename, int(self.rows[p]), None if c is None else str(c), None if v is None else str(v), str(e))
            for p, c, v, e in zip(shown["position"], shown["column"], shown["value"], shown["expected"])
        ]
        return CheckResult(clean, problems, len(self.file_problems) + len(found), self.warnings[:max_problems])


def _pick(values, positions: np.ndarray):
    if isinstance(values, pd.Series):
        return values.to_numpy(dtype=object)[positions]
    if isinstance(values, np.ndarray):
        return values.astype(object)[positions]
    return np.full(len(positions), values, dtype=object)


def _with_article(word: str) -> str:
    return ("an " if word[:1] in "aeiou" else "a ") + word


def _file_problem(filename: str, column: str | None, expected: str, value: str | None = None) -> Problem:
    return Problem(filename, None, column, value, expected)


def _reject_file(filename: str, problems: list[Problem], columns, warnings=()) -> CheckResult:
    return CheckResult(_empty_frame(columns), problems, len(problems), list(warnings))


def _empty_frame(columns) -> pd.DataFrame:
    return pd.DataFrame({c: pd.Series([], dtype="str") for c in columns})


def _text(frame: pd.DataFrame, column: str) -> pd.Series:
    """A column as text (the reader has stripped it), or all "" when the file does not have it."""
    if column in frame.columns:
        return frame[column].astype("str")
    return pd.Series("", index=frame.index, dtype="str")


def _free_text(frame: pd.DataFrame, column: str) -> pd.Series:
    """A free-text column as received, less the one quote that the tool's own escaping put before a formula character."""
    return unescape_formula_text(_text(frame, column)).astype("str")


def _plain_codes(issues: _Issues, text: pd.Series, filled, *, column: str) -> np.ndarray:
    """Flag filled codes that a spreadsheet would run as formulas; return the filled cells that are not."""
    filled = np.asarray(filled, dtype=bool)
    formula = filled & looks_like_formula(text)
    issues.add(formula, column, text, FORMULA_CODE_TEXT)
    return filled & ~formula


def _amount(number: float) -> str:
    """A limit as the user reads it: 1,000,000,000 rather than 1e+09."""
    return f"{number:,.0f}" if float(number).is_integer() else f"{number:,g}"


def _as_na(text: pd.Series) -> pd.Series:
    """Text with "" as missing, in pandas' string dtype."""
    return text.astype("string").mask(text == "")


def _warn_unknown_columns(issues: _Issues, frame: pd.DataFrame, known, *, what: str) -> None:
    for column in frame.columns:
        if column not in known and column not in REFERENCE_COLUMNS:
            issues.warn(column, None, f"a {what} column ({', '.join(known)}); this column is ignored")


def _check_frame_not_empty(raw: RawTable, filename: str) -> list[Problem]:
    if len(raw.frame) == 0:
        return [_file_problem(filename, None, "at least one data row; the file has none")]
    return []


# ---------------------------------------------------------------------------
# rules shared by several kinds


def _exactly_one(issues: _Issues, first: pd.Series, second: pd.Series, names: tuple[str, str], *, required: bool):
    """Flag rows that fill both columns, and (when required) rows that fill neither."""
    has_first, has_second = (first != "").to_numpy(), (second != "").to_numpy()
    issues.add(has_first & has_second, names[1], second, f"either '{names[0]}' or '{names[1]}' in a row, not both")
    if required:
        issues.add(~has_first & ~has_second, names[0], "", f"a value in '{names[0]}' or in '{names[1]}'")
    return has_first & ~has_second, has_second & ~has_first


def _code_lookup(codes) -> tuple[set[str], dict[str, str]]:
    """Exact codes, and the lower-case spellings that map to exactly one code."""
    known = pd.Series(pd.unique(pd.Series(codes, dtype="str").dropna().str.strip()), dtype="str")
    known = known[known != ""]
    lower = known.str.lower()
    unique_lower = ~lower.duplicated(keep=False)
    return set(known), dict(zip(lower[unique_lower], known[unique_lower]))


def _match_codes(issues: _Issues, text: pd.Series, filled, codes, *, column: str, what: str) -> pd.Series:
    """Resolve codes against the master: exact first, else a unique case-insensitive match."""
    filled = np.asarray(filled, dtype=bool)
    if not filled.any():
        return pd.Series("", index=text.index, dtype="str")
    exact, by_lower = _code_lookup(codes)
    is_exact = text.isin(exact).to_numpy()
    resolved = text.where(filled & is_exact, "")
    inexact = filled & ~is_exact
    respelled = text[inexact].str.lower().map(by_lower)
    found = respelled.notna().to_numpy()
    unknown = _spread(inexact, ~found)
    expected = f"{_with_article(what)} code in the {MASTER_OF[column]} master"
    issues.add(unknown, column, text, _with_hints(text, unknown, exact, expected))
    if found.any():
        pairs = pd.DataFrame({"given": text[inexact][found], "master": respelled[found]}).drop_duplicates()
        for given, master in zip(pairs["given"], pairs["master"]):
            issues.warn(column, given, f"the exact spelling; read as the master's '{master}'")
        resolved[_spread(inexact, found)] = respelled[found].to_numpy()
    return resolved


def _with_hints(text: pd.Series, unknown: np.ndarray, exact: set[str], expected: str) -> str | pd.Series:
    """``expected`` per row, naming the master's nearest code where one is close ("DRIP-KTS" for "DRIP-KITS").

    A submitter who mistyped one letter then fixes the file without looking the code up.  Only the first
    ``MAX_CODE_HINTS`` distinct unknown codes are looked at: a hint costs a pass over the master.
    """
    if not unknown.any() or not exact:
        return expected
    by_upper = {code.upper(): code for code in sorted(exact)}
    hints = {}
    for given in pd.unique(text[unknown])[:MAX_CODE_HINTS]:
        if given.upper() in by_upper:  # matches several codes but for case: no one code to suggest
            continue
        close = difflib.get_close_matches(given.upper(), list(by_upper), n=1, cutoff=0.8)
        if close:
            hints[given] = f"{expected}; did you mean '{by_upper[close[0]]}'?"
    if not hints:
        return expected
    return text.map(hints).fillna(expected)


def _spread(where: np.ndarray, subset: np.ndarray) -> np.ndarray:
    """A full-length mask that is true at the positions of ``where`` selected by ``subset``."""
    mask = np.zeros(len(where), dtype=bool)
    mask[np.flatnonzero(where)[subset]] = True
    return mask


def _parse_numbers(
    issues: _Issues,
    text: pd.Series,
    filled,
    *,
    column: str,
    minimum: float | None = None,
    above_minimum: bool = False,
    minimum_text: str = "",
    maximum: float | None = None,
    maximum_text: str = "",
    magnitude: bool = False,
    integer: bool = False,
) -> np.ndarray:
    """Parse filled cells as finite numbers; flag text, NaN, infinities and values below the minimum or above the maximum.

    With ``magnitude`` the maximum bounds the absolute value (for numbers
    that may be negative, such as units lost to an event).
    """
    filled = np.asarray(filled, dtype=bool)
    numbers = pd.to_numeric(text.where(filled, ""), errors="coerce").to_numpy(dtype=float)
    lowered = text.str.lower().str.lstrip("+-")
    says_nan = lowered.isin({"nan", "na", "n/a", "#n/a", "null", "none"}).to_numpy()
    is_nan = np.isnan(numbers)
    issues.add(filled & is_nan & ~says_nan, column, text, NUMBER_TEXT)
    issues.add(filled & says_nan, column, text, "a number, not a missing-value marker")
    is_inf = np.isinf(numbers)
    issues.add(filled & is_inf, column, text, "a finite number")
    finite = filled & np.isfinite(numbers)
    if minimum is not None:
        low = numbers <= minimum if above_minimum else numbers < minimum
        issues.add(finite & low, column, text, minimum_text)
    if maximum is not None:
        size = np.abs(numbers) if magnitude else numbers
        issues.add(finite & (size > maximum), column, text, maximum_text)
    if integer:
        issues.add(finite & (np.floor(numbers) != numbers), column, text, "a whole number")
    return np.where(finite, numbers, np.nan)


def _resolve_cycles(
    issues: _Issues, frame: pd.DataFrame, horizons: dict[str, list[str]], default_cycle: str | None
) -> tuple[pd.Series, np.ndarray]:
    """Each row's cycle (its own column, else ``default_cycle``) and whether it is a known cycle."""
    own = _text(frame, "cycle")
    cycles = own.where(own != "", default_cycle or "")
    missing = (cycles == "").to_numpy()
    issues.add(missing, "cycle", "", "a cycle month (YYYY-MM) in this column or given on submit")
    well_formed = cycles.str.match(MONTH_PATTERN.pattern).to_numpy()
    issues.add(~missing & ~well_formed, "cycle", cycles, "a cycle month in YYYY-MM form")
    open_cycles = sorted(horizons)
    listed = ", ".join(open_cycles) if open_cycles else "none"
    known = cycles.isin(set(open_cycles)).to_numpy()
    issues.add(~missing & well_formed & ~known, "cycle", cycles, f"one of the open cycles ({listed})")
    return cycles, known


def _horizon_texts(horizons: dict[str, list[str]]) -> dict[str, str]:
    return {
        cycle: (f"the horizon {min(months)} … {max(months)} of cycle {cycle}" if months else f"an open horizon for cycle {cycle}")
        for cycle, months in horizons.items()
    }


def _horizon_keys(horizons: dict[str, list[str]]) -> set[str]:
    return {f"{cycle}|{month}" for cycle, months in horizons.items() for month in months}


def _check_months(issues: _Issues, text: pd.Series, filled, *, column: str) -> np.ndarray:
    filled = np.asarray(filled, dtype=bool)
    good = text.str.match(MONTH_PATTERN.pattern).to_numpy()
    issues.add(filled & ~good, column, text, "a month in YYYY-MM form (e.g. 2027-04)")
    return filled & good


def _month_numbers(text: pd.Series, valid) -> np.ndarray:
    """Month index year*12 + month-1 of valid "YYYY-MM" cells; -1 elsewhere."""
    valid = np.asarray(valid, dtype=bool)
    safe = text.where(valid, "0000-01")
    return np.where(valid, safe.str.slice(0, 4).astype(int).to_numpy() * 12 + safe.str.slice(5, 7).astype(int).to_numpy() - 1, -1)


def _month_names(indexes: np.ndarray) -> pd.Series:
    """"YYYY-MM" of month indexes year*12 + month-1 (as :func:`_month_numbers` makes them); "" for negative ones."""
    indexes = np.asarray(indexes)
    safe = np.where(indexes >= 0, indexes, 0)
    text = pd.Series(safe // 12, dtype="int64").astype(str).str.zfill(4) + "-" + pd.Series(safe % 12 + 1, dtype="int64").astype(str).str.zfill(2)
    return text.where(indexes >= 0, "")


def _iso_week_mondays(text: pd.Series, filled) -> tuple[np.ndarray, pd.Series]:
    """Which "YYYY-Www" cells are real ISO weeks (ISO 8601), and each one's Monday."""
    filled = np.asarray(filled, dtype=bool)
    if not filled.any():
        return filled, pd.Series(pd.NaT, index=text.index, dtype="datetime64[ns]")
    shaped = filled & text.str.match(WEEK_PATTERN).to_numpy()
    mondays = pd.to_datetime(text.where(shaped, "") + "-1", format="%G-W%V-%u", errors="coerce")
    calendar = mondays.dt.isocalendar()
    # W53 exists only in long ISO years; a parser may roll it into the next year, so check the round trip.
    round_trip = (
        calendar["year"].astype("Int64").astype("string").fillna("")
        + "-W"
        + calendar["week"].astype("Int64").astype("string").fillna("").str.zfill(2)
    )
    valid = shaped & (round_trip.to_numpy(dtype=object) == text.to_numpy(dtype=object))
    return valid, mondays


def _flag_duplicates(issues: _Issues, key: pd.Series, usable, *, column, what: str, values=None) -> None:
    """Flag every repeat of a key after its first occurrence, naming the first's row."""
    usable = np.asarray(usable, dtype=bool)
    keyed = pd.DataFrame({"key": key, "row": issues.rows})[usable]
    repeated = keyed["key"].duplicated(keep="first")
    if not repeated.any():
        return
    first_row = keyed.groupby("key", sort=False)["row"].transform("first")
    mask = np.zeros(len(key), dtype=bool)
    mask[np.flatnonzero(usable)[repeated.to_numpy()]] = True
    expected = pd.Series("", index=key.index, dtype=object)
    expected[mask] = (f"one row per {what}; the same one is already at row " + first_row[repeated].astype(str)).to_numpy()
    if values is None:
        values = key.str.replace("|", " / ", regex=False)
    issues.add(mask, column, values, expected)


def _level_key(first: pd.Series, second: pd.Series, labels: tuple[str, str]) -> pd.Series:
    """One text per row naming which of two columns it fills and with what ("item=A1")."""
    return (labels[0] + "=" + first).where(first != "", (labels[1] + "=" + second).where(second != "", ""))


# ---------------------------------------------------------------------------
# forecasts


def check_forecast_rows(
    raw: RawTable,
    *,
    filename: str | None = None,
    items: pd.DataFrame,
    locations: pd.DataFrame,
    horizons: dict[str, list[str]],
    default_cycle: str | None,
    max_problems: int = DEFAULT_MAX_PROBLEMS,
    limits: IntakeLimits = DEFAULT_LIMITS,
    frozen_months: int = 0,
) -> CheckResult:
    """Check a forecast submission and return its rows typed.

    Each row names an ``item`` or a ``family``; optionally a ``location`` or
    a ``region`` (neither means every location); a ``period`` ("YYYY-MM") or
    an ISO ``week`` ("YYYY-Www"); and a ``quantity`` in units or a ``value``
    in money (converted later with the unit price), each from 0 to its limit
    in ``limits``.  ``cycle`` is taken from the row or else from
    ``default_cycle``; a period must lie in that cycle's horizon, a week must
    overlap it.  The first ``frozen_months`` months of each horizon (store
    setting ``cycle.frozen_months``) take no number, in either layout, nor
    does a week reaching one of them.  Clean columns: [row, cycle, item,
    family, location, region, period, week, quantity, value, note].
    """
    filename = filename or raw.file
    frame = raw.frame
    out_columns = ("row",) + FORECAST_COLUMNS
    columns = set(frame.columns)
    problems = _check_frame_not_empty(raw, filename)
    for pair in (("item", "family"), ("period", "week"), ("quantity", "value")):
        if not columns & set(pair):
            problems.append(_file_problem(filename, pair[0], f"a column '{pair[0]}' or '{pair[1]}'"))
    issues = _Issues(filename, raw.rows)
    _warn_unknown_columns(issues, frame, FORECAST_COLUMNS, what="forecast")
    if problems:
        return _reject_file(filename, problems, out_columns, issues.warnings)

    item, family, location, region = _product_and_place(issues, frame, items, locations)

    cycles, known_cycle = _resolve_cycles(issues, frame, horizons, default_cycle)
    period, week = _text(frame, "period"), _text(frame, "week")
    is_period, is_week = _exactly_one(issues, period, week, ("period", "week"), required=True)
    good_period = _check_months(issues, period, is_period, column="period")
    horizon_text = cycles.map(_horizon_texts(horizons)).fillna("")
    in_horizon = (cycles + "|" + period).isin(_horizon_keys(horizons)).to_numpy()
    issues.add(good_period & known_cycle & ~in_horizon, "period", period, "a month in " + horizon_text)

    good_week, mondays = _iso_week_mondays(week, is_week)
    issues.add(is_week & ~good_week, "week", week, "an ISO week in YYYY-Www form (e.g. 2027-W05)")
    monday_month = mondays.dt.strftime("%Y-%m").fillna("")
    sunday_month = (mondays + pd.Timedelta(days=6)).dt.strftime("%Y-%m").fillna("")
    keys = _horizon_keys(horizons)
    overlaps = (cycles + "|" + monday_month).isin(keys).to_numpy() | (cycles + "|" + sunday_month).isin(keys).to_numpy()
    issues.add(good_week & known_cycle & ~overlaps, "week", week, "a week overlapping " + horizon_text)

    quantity_text, value_text = _text(frame, "quantity"), _text(frame, "value")
    is_quantity, is_value = _exactly_one(issues, quantity_text, value_text, ("quantity", "value"), required=True)
    quantity = _parse_numbers(issues, quantity_text, is_quantity, column="quantity", minimum=0.0,
                              minimum_text="a quantity of 0 or more", maximum=limits.max_forecast_quantity,
                              maximum_text=f"a quantity of at most {_amount(limits.max_forecast_quantity)}")
    value = _parse_numbers(issues, value_text, is_value, column="value", minimum=0.0,
                           minimum_text="a value of 0 or more", maximum=limits.max_forecast_value,
                           maximum_text=f"a value of at most {_amount(limits.max_forecast_value)}")
    _check_prices_for_values(issues, items, item, family, is_value, value_text)
    _check_frozen_months(issues, frozen_months, horizons, cycles, period, is_period,
                         (monday_month, sunday_month), is_week, np.where(is_value, value_text, quantity_text),
                         np.where(is_value, "value", "quantity"))

    grain = cycles + "|" + _level_key(item, family, ("item", "family")) + "|" + _level_key(location, region, ("location", "region")) + "|" + _level_key(period, week, ("period", "week"))
    _flag_duplicates(
        issues, grain, ~issues.bad, column=np.where(is_week, "week", "period"),
        what="cycle, item or family, location or region, and period or week",
    )

    keep = ~issues.bad
    clean = pd.DataFrame(
        {
            "row": raw.rows[keep],
            "cycle": _as_na(cycles[keep]),
            "item": _as_na(item[keep]),
            "family": _as_na(family[keep]),
            "location": _as_na(location[keep]),
            "region": _as_na(region[keep]),
            "period": _as_na(period[keep]),
            "week": _as_na(week[keep]),
            "quantity": quantity[keep],
            "value": value[keep],
            "note": _as_na(_free_text(frame, "note")[keep]),
        }
    ).reset_index(drop=True)
    return issues.result(clean, max_problems)


def _check_frozen_months(issues: _Issues, frozen_months: int, horizons: dict[str, list[str]], cycles: pd.Series,
                         period: pd.Series, is_period, week_months, is_week, amount, amount_column) -> None:
    """A number in a frozen month: the cycle's rules keep the horizon's first ``frozen_months`` months as planned."""
    if frozen_months <= 0:
        return
    frozen = {f"{c}|{m}" for c, months in horizons.items() for m in sorted(months)[:frozen_months]}
    hit = np.asarray(is_period, dtype=bool) & (cycles + "|" + period).isin(frozen).to_numpy()
    for month in week_months:
        hit |= np.asarray(is_week, dtype=bool) & (cycles + "|" + month).isin(frozen).to_numpy()
    months = "the first month of the horizon is" if frozen_months == 1 else \
        f"the first {frozen_months} months of the horizon are"
    issues.add(hit, amount_column, pd.Series(amount, index=cycles.index),
               f"no number here: {months} frozen (setting cycle.frozen_months) and keep the plan they have")


def _product_and_place(issues: _Issues, frame: pd.DataFrame, items: pd.DataFrame, locations: pd.DataFrame):
    """Item or family (one required) and location or region (at most one), checked and matched to the master."""
    item, family = _text(frame, "item"), _text(frame, "family")
    is_item, is_family = _exactly_one(issues, item, family, ("item", "family"), required=True)
    is_item = _plain_codes(issues, item, is_item, column="item")
    is_family = _plain_codes(issues, family, is_family, column="family")
    item = _match_codes(issues, item, is_item, items["item"], column="item", what="item")
    family = _match_codes(issues, family, is_family, items["family"], column="family", what="family")

    location, region = _text(frame, "location"), _text(frame, "region")
    is_location, is_region = _exactly_one(issues, location, region, ("location", "region"), required=False)
    is_location = _plain_codes(issues, location, is_location, column="location")
    is_region = _plain_codes(issues, region, is_region, column="region")
    location = _match_codes(issues, location, is_location, locations["location"], column="location", what="location")
    region = _match_codes(issues, region, is_region, locations["region"], column="region", what="region")
    return item, family, location, region


def _check_prices_for_values(issues: _Issues, items: pd.DataFrame, item, family, is_value, value_text) -> None:
    """A money value needs a positive unit price: the item's own, or any priced item of the family."""
    if "unit_price" in items.columns:
        prices = pd.to_numeric(items["unit_price"], errors="coerce")
        priced = items.assign(_price=prices)[prices > 0]
    else:
        priced = items.iloc[0:0].assign(_price=pd.Series([], dtype=float))
    priced_items = set(priced["item"].astype(str).str.strip())
    priced_families = set(priced["family"].astype(str).str.strip())
    item_rows = is_value & (item != "").to_numpy()
    family_rows = is_value & (family != "").to_numpy()
    issues.add(item_rows & ~item.isin(priced_items).to_numpy(), "value", value_text,
               "a quantity instead: item '" + item + "' has no unit price to turn a value into units")
    issues.add(family_rows & ~family.isin(priced_families).to_numpy(), "value", value_text,
               "a quantity instead: family '" + family + "' has no priced item to turn a value into units")


# ---------------------------------------------------------------------------
# events


def check_event_rows(
    raw: RawTable,
    *,
    filename: str | None = None,
    items: pd.DataFrame,
    locations: pd.DataFrame,
    horizons: dict[str, list[str]],
    default_cycle: str | None,
    max_problems: int = DEFAULT_MAX_PROBLEMS,
    limits: IntakeLimits = DEFAULT_LIMITS,
) -> CheckResult:
    """Check a file of planned events (promotions, price changes, launches).

    Each row names an ``event``, an ``item`` or ``family``, optionally a
    ``location`` or ``region``, months ``start`` ≤ ``end`` that overlap the
    cycle's horizon and reach no further from it than
    ``limits.event_months_outside_horizon``, and exactly one effect:
    ``uplift_pct`` (> −100 and at most ``limits.max_event_uplift_pct``;
    negative for a dip such as a price increase) or ``units`` (units added,
    negative for a loss, at most ``limits.max_event_units`` either way).
    Clean columns: [row, cycle, event, item, family, location, region, start,
    end, uplift_pct, units, note].
    """
    filename = filename or raw.file
    frame = raw.frame
    out_columns = ("row",) + EVENT_COLUMNS
    columns = set(frame.columns)
    problems = _check_frame_not_empty(raw, filename)
    for column in ("event", "start", "end"):
        if column not in columns:
            problems.append(_file_problem(filename, column, f"a column '{column}'"))
    for pair in (("item", "family"), ("uplift_pct", "units")):
        if not columns & set(pair):
            problems.append(_file_problem(filename, pair[0], f"a column '{pair[0]}' or '{pair[1]}'"))
    issues = _Issues(filename, raw.rows)
    _warn_unknown_columns(issues, frame, EVENT_COLUMNS, what="event")
    if problems:
        return _reject_file(filename, problems, out_columns, issues.warnings)

    event = _text(frame, "event")
    issues.add((event == "").to_numpy(), "event", "", "an event name")
    _plain_codes(issues, event, event != "", column="event")
    item, family, location, region = _product_and_place(issues, frame, items, locations)

    cycles, known_cycle = _resolve_cycles(issues, frame, horizons, default_cycle)
    start, end = _text(frame, "start"), _text(frame, "end")
    for column, text in (("start", start), ("end", end)):
        issues.add((text == "").to_numpy(), column, "", "a month in YYYY-MM form")
    good_start = _check_months(issues, start, start != "", column="start")
    good_end = _check_months(issues, end, end != "", column="end")
    start_at, end_at = _month_numbers(start, good_start), _month_numbers(end, good_end)
    both = good_start & good_end
    issues.add(both & (end_at < start_at), "end", end, "an end month on or after the start " + start)
    first = cycles.map({c: min(m) for c, m in horizons.items() if m})
    last = cycles.map({c: max(m) for c, m in horizons.items() if m})
    first_at = _month_numbers(first.fillna(""), known_cycle & first.notna().to_numpy())
    last_at = _month_numbers(last.fillna(""), known_cycle & last.notna().to_numpy())
    overlaps = (start_at <= last_at) & (end_at >= first_at)
    horizon_text = cycles.map(_horizon_texts(horizons)).fillna("")
    issues.add(both & known_cycle & (end_at >= start_at) & ~overlaps, "start", start,
               "an event overlapping " + horizon_text)
    outside = limits.event_months_outside_horizon
    earliest = _month_names(first_at - outside)
    latest = _month_names(last_at + outside)
    near = both & known_cycle & (end_at >= start_at) & overlaps
    issues.add(near & (start_at < first_at - outside), "start", start,
               f"an event starting at most {outside} months before the horizon, so not before " + earliest)
    issues.add(near & (end_at > last_at + outside), "end", end,
               f"an event ending at most {outside} months after the horizon, so not after " + latest)

    uplift_text, units_text = _text(frame, "uplift_pct"), _text(frame, "units")
    is_uplift, is_units = _exactly_one(issues, uplift_text, units_text, ("uplift_pct", "units"), required=True)
    uplift = _parse_numbers(issues, uplift_text, is_uplift, column="uplift_pct", minimum=-100.0,
                            above_minimum=True, minimum_text="an uplift above -100 percent",
                            maximum=limits.max_event_uplift_pct,
                            maximum_text=f"an uplift of at most {_amount(limits.max_event_uplift_pct)} percent")
    units = _parse_numbers(issues, units_text, is_units, column="units", maximum=limits.max_event_units,
                           magnitude=True,
                           maximum_text=f"units between -{_amount(limits.max_event_units)} and {_amount(limits.max_event_units)}")

    key = (cycles + "|" + event + "|" + _level_key(item, family, ("item", "family")) + "|"
           + _level_key(location, region, ("location", "region")) + "|" + start)
    _flag_duplicates(issues, key, ~issues.bad, column="event",
                     what="cycle, event, item or family, location or region, and start")

    keep = ~issues.bad
    clean = pd.DataFrame(
        {
            "row": raw.rows[keep],
            "cycle": _as_na(cycles[keep]),
            "event": _as_na(event[keep]),
            "item": _as_na(item[keep]),
            "family": _as_na(family[keep]),
            "location": _as_na(location[keep]),
            "region": _as_na(region[keep]),
            "start": _as_na(start[keep]),
            "end": _as_na(end[keep]),
            "uplift_pct": uplift[keep],
            "units": units[keep],
            "note": _as_na(_free_text(frame, "note")[keep]),
        }
    ).reset_index(drop=True)
    return issues.result(clean, max_problems)


# ---------------------------------------------------------------------------
# actuals


def check_actual_rows(
    raw: RawTable,
    *,
    filename: str | None = None,
    items: pd.DataFrame,
    locations: pd.DataFrame,
    max_problems: int = DEFAULT_MAX_PROBLEMS,
    limits: IntakeLimits = DEFAULT_LIMITS,
) -> CheckResult:
    """Check customer-order history and sum it into monthly buckets.

    Rows carry ``item``, ``location``, a ``quantity`` from 0 to
    ``limits.max_actual_quantity`` and either a ``date`` ("YYYY-MM-DD", one
    order line) or a ``period`` ("YYYY-MM", a monthly total), in the months
    ``limits.actual_months()`` allows (by default none after the current
    calendar month: orders cannot come from the future).  Repeated monthly
    totals, or a monthly total next to order lines of the same item, location
    and month, are problems because summing them would count the demand
    twice.

    A forecast given here is refused as a whole: a file with a column only
    forecasts and events have (cycle, week, value, family, region …) or with a
    template's hidden sheet, or one whose rows lie mostly after the latest
    allowed month (a distribution center's item, location, period, quantity
    forecast has exactly the columns of monthly history).  Clean columns:
    [item, location, period, quantity], one row per item × location × month.
    """
    filename = filename or raw.file
    frame = raw.frame
    out_columns = ("item", "location", "period", "quantity")
    columns = set(frame.columns)
    problems = _check_frame_not_empty(raw, filename)
    for column in ("item", "location", "quantity"):
        if column not in columns:
            problems.append(_file_problem(filename, column, f"a column '{column}'"))
    if not columns & {"date", "period"}:
        problems.append(_file_problem(filename, "date", "a column 'date' or 'period'"))
    forecast_columns = [c for c in FORECAST_ONLY_COLUMNS if c in columns]
    template_keys = [k for k in TEMPLATE_META_KEYS if str(raw.meta.get(k, "")).strip()]
    if forecast_columns or template_keys:
        said = (f"it has the column(s) {', '.join(repr(c) for c in forecast_columns)}" if forecast_columns
                else f"it is a template, with {', '.join(f'{k} {raw.meta[k]!r}' for k in template_keys)} on its hidden sheet")
        problems.append(_file_problem(filename, forecast_columns[0] if forecast_columns else None,
                                      f"order history (item, location, date or period, quantity), not a forecast; {said} "
                                      "(forecasts are submitted, not loaded as actuals)"))
    issues = _Issues(filename, raw.rows)
    _warn_unknown_columns(issues, frame, ACTUAL_COLUMNS, what="actuals")
    if problems:
        return _reject_file(filename, problems, out_columns, issues.warnings)

    item, location = _text(frame, "item"), _text(frame, "location")
    issues.add((item == "").to_numpy(), "item", "", "an item code")
    issues.add((location == "").to_numpy(), "location", "", "a location code")
    has_item = _plain_codes(issues, item, item != "", column="item")
    has_location = _plain_codes(issues, location, location != "", column="location")
    item = _match_codes(issues, item, has_item, items["item"], column="item", what="item")
    location = _match_codes(issues, location, has_location, locations["location"], column="location", what="location")

    date, period = _text(frame, "date"), _text(frame, "period")
    is_date, is_period = _exactly_one(issues, date, period, ("date", "period"), required=True)
    parsed = pd.to_datetime(date.where(is_date & date.str.match(DATE_PATTERN).to_numpy(), ""),
                            format="%Y-%m-%d", errors="coerce")
    good_date = is_date & parsed.notna().to_numpy()
    issues.add(is_date & ~good_date, "date", date, "a calendar date in YYYY-MM-DD form")
    good_period = _check_months(issues, period, is_period, column="period")
    month = period.where(good_period, parsed.dt.strftime("%Y-%m").fillna(""))
    _check_history_months(issues, month, good_date, good_period, date=date, period=period, limits=limits)

    quantity_text = _text(frame, "quantity")
    issues.add((quantity_text == "").to_numpy(), "quantity", "", "a quantity")
    quantity = _parse_numbers(issues, quantity_text, quantity_text != "", column="quantity", minimum=0.0,
                              minimum_text="a quantity of 0 or more", maximum=limits.max_actual_quantity,
                              maximum_text=f"a quantity of at most {_amount(limits.max_actual_quantity)}")

    key = item + "|" + location + "|" + month
    usable = ~issues.bad
    _flag_duplicates(issues, key, usable & good_period, column="period", what="item, location and month in monthly totals")
    daily_keys = set(key[usable & good_date])
    issues.add(usable & good_period & key.isin(daily_keys).to_numpy(), "period", period,
               "either order lines with dates or a monthly total for an item, location and month, not both")

    keep = ~issues.bad
    monthly = (
        pd.DataFrame({"item": item[keep], "location": location[keep], "period": month[keep], "quantity": quantity[keep]})
        .groupby(["item", "location", "period"], as_index=False, sort=True)["quantity"]
        .sum()
    )
    for column in ("item", "location", "period"):
        monthly[column] = monthly[column].astype("string")
    return issues.result(monthly, max_problems)


def _check_history_months(issues: _Issues, month: pd.Series, good_date, good_period, *, date: pd.Series,
                          period: pd.Series, limits: IntakeLimits) -> None:
    """Order months inside the allowed window; a file mostly after it is named a forecast, once, for the whole file."""
    earliest, latest = limits.actual_months()
    dated = np.asarray(good_date, dtype=bool) | np.asarray(good_period, dtype=bool)
    at = _month_numbers(month, dated)
    early = dated & (at < month_index(earliest))
    late = dated & (at > month_index(latest))
    window = f"{earliest} … {latest}"
    for mask, why in ((early, ""), (late, ": orders cannot come from the future")):
        issues.add(mask & good_date, "date", date, f"a date in the months {window}{why}")
        issues.add(mask & good_period, "period", period, f"a month in {window}{why}")
    if late.any() and 2 * int(late.sum()) > int(dated.sum()):
        months = month[late]
        issues.add_file_problem(
            "date" if np.asarray(good_date, dtype=bool)[late].any() else "period", None,
            f"order history up to {latest}; {int(late.sum()):,} of {int(dated.sum()):,} rows are for later months "
            f"({months.min()} … {months.max()}), so this looks like a forecast (forecasts are submitted, "
            "not loaded as actuals)",
        )


# ---------------------------------------------------------------------------
# master data


def check_master_rows(
    raw: RawTable,
    *,
    filename: str | None = None,
    kind: str,
    max_problems: int = DEFAULT_MAX_PROBLEMS,
    limits: IntakeLimits = DEFAULT_LIMITS,
) -> CheckResult:
    """Check a master-data file: ``kind`` is "items", "locations" or "bom".

    items: [item, family, unit_price (0 … ``limits.max_unit_price``,
    optional), description]; locations: [location, region, description];
    bom: [parent, component, qty_per (> 0, at most ``limits.max_qty_per``),
    lead_time_months (whole, 0 … ``limits.max_lead_time_months``)].  The
    clean frame always carries ``description``, "" where the file has none
    (the column is optional, the store's is not null).  Codes must be unique
    (ignoring case, since submissions match codes ignoring case).  A BOM must be
    acyclic: edges inside a strongly connected component of the
    parent → component graph (Tarjan 1972, via scipy.sparse.csgraph), or
    from an item to itself, are reported with the cycle they close.
    """
    if kind not in MASTER_COLUMNS:
        raise InvalidSpec(f"kind must be one of {', '.join(MASTER_COLUMNS)}; got {kind!r}")
    filename = filename or raw.file
    frame = raw.frame
    columns = MASTER_COLUMNS[kind]
    problems = _check_frame_not_empty(raw, filename)
    for column in MASTER_REQUIRED[kind]:
        if column not in frame.columns:
            problems.append(_file_problem(filename, column, f"a column '{column}'"))
    issues = _Issues(filename, raw.rows)
    _warn_unknown_columns(issues, frame, columns, what=f"{kind} master")
    if problems:
        return _reject_file(filename, problems, columns, issues.warnings)

    if kind == "bom":
        return _check_bom(issues, frame, max_problems, limits)
    key_column, parent_column = columns[0], columns[1]
    key, parent = _text(frame, key_column), _text(frame, parent_column)
    issues.add((key == "").to_numpy(), key_column, "", f"{_with_article(key_column)} code")
    issues.add((parent == "").to_numpy(), parent_column, "", f"{_with_article(parent_column)} code")
    _plain_codes(issues, key, key != "", column=key_column)
    _plain_codes(issues, parent, parent != "", column=parent_column)
    data = {key_column: key, parent_column: parent}
    if kind == "items":
        price_text = _text(frame, "unit_price")
        data["unit_price"] = _parse_numbers(issues, price_text, price_text != "", column="unit_price", minimum=0.0,
                                            minimum_text="a unit price of 0 or more", maximum=limits.max_unit_price,
                                            maximum_text=f"a unit price of at most {_amount(limits.max_unit_price)}")
    _flag_duplicates(issues, key.str.lower(), (key != "").to_numpy(), column=key_column,
                     what=f"{key_column} code (compared ignoring case)", values=key)
    keep = ~issues.bad
    clean = pd.DataFrame({c: (_as_na(v[keep]) if isinstance(v, pd.Series) else v[keep]) for c, v in data.items()})
    # Free text, never missing: blank or absent is "", which the store's not-null column takes.
    clean["description"] = _free_text(frame, "description")[keep].astype("string").to_numpy()
    return issues.result(clean.reset_index(drop=True), max_problems)


def _check_bom(issues: _Issues, frame: pd.DataFrame, max_problems: int, limits: IntakeLimits) -> CheckResult:
    parent, component = _text(frame, "parent"), _text(frame, "component")
    issues.add((parent == "").to_numpy(), "parent", "", "a parent item code")
    issues.add((component == "").to_numpy(), "component", "", "a component item code")
    plain_parent = _plain_codes(issues, parent, parent != "", column="parent")
    plain_component = _plain_codes(issues, component, component != "", column="component")
    qty_text, lead_text = _text(frame, "qty_per"), _text(frame, "lead_time_months")
    issues.add((qty_text == "").to_numpy(), "qty_per", "", "a quantity per parent")
    issues.add((lead_text == "").to_numpy(), "lead_time_months", "", "a lead time in whole months")
    qty_per = _parse_numbers(issues, qty_text, qty_text != "", column="qty_per", minimum=0.0, above_minimum=True,
                             minimum_text="a quantity per parent above 0", maximum=limits.max_qty_per,
                             maximum_text=f"a quantity per parent of at most {_amount(limits.max_qty_per)}")
    lead = _parse_numbers(issues, lead_text, lead_text != "", column="lead_time_months", minimum=0.0,
                          minimum_text="a lead time of 0 months or more", integer=True,
                          maximum=limits.max_lead_time_months,
                          maximum_text=f"a lead time of at most {_amount(limits.max_lead_time_months)} months")
    named = plain_parent & plain_component
    _flag_duplicates(issues, parent + "|" + component, named, column="component", what="parent and component pair")
    _flag_bom_cycles(issues, parent, component, named)
    keep = ~issues.bad
    clean = pd.DataFrame(
        {
            "parent": _as_na(parent[keep]),
            "component": _as_na(component[keep]),
            "qty_per": qty_per[keep],
            "lead_time_months": lead[keep].astype(int) if keep.any() else np.array([], dtype=int),
        }
    ).reset_index(drop=True)
    return issues.result(clean, max_problems)


def _flag_bom_cycles(issues: _Issues, parent: pd.Series, component: pd.Series, named: np.ndarray) -> None:
    """Report every BOM line that lies on a cycle, with one cycle through it spelled out."""
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    if not named.any():
        return
    codes, index = np.unique(np.concatenate([parent[named].to_numpy(dtype=object), component[named].to_numpy(dtype=object)]),
                             return_inverse=True)
    count = int(named.sum())
    heads, tails = index[:count], index[count:]
    graph = coo_matrix((np.ones(count), (heads, tails)), shape=(len(codes), len(codes))).tocsr()
    _, labels = connected_components(graph, directed=True, connection="strong")
    sizes = np.bincount(labels)
    on_cycle = (labels[heads] == labels[tails]) & ((sizes[labels[heads]] > 1) | (heads == tails))
    if not on_cycle.any():
        return
    line_rows = issues.rows[named]
    edges = pd.DataFrame({"head": heads, "tail": tails, "row": line_rows})[on_cycle]
    successors = edges.groupby("head")[["tail", "row"]].apply(lambda g: list(zip(g["tail"], g["row"]))).to_dict()
    texts = []
    for head, tail, row in zip(edges["head"], edges["tail"], edges["row"]):
        path, rows = _path_back(successors, tail, head)
        names = " → ".join(str(codes[n]) for n in [head, *path])
        line_rows = sorted({int(row), *rows})
        where = ("row " if len(line_rows) == 1 else "rows ") + ", ".join(str(r) for r in line_rows)
        texts.append(f"no cycle in the bill of materials; this line closes {names} ({where})")
    mask = np.zeros(len(parent), dtype=bool)
    mask[np.flatnonzero(named)[on_cycle]] = True
    expected = np.full(len(parent), "", dtype=object)
    expected[mask] = texts
    issues.add(mask, "component", component, expected)


def _path_back(successors: dict, start: int, goal: int) -> tuple[list[int], list[int]]:
    """Shortest path start → … → goal over cycle edges (breadth-first); nodes from start and the rows used."""
    previous = {start: None}
    frontier = [start]
    while frontier and goal not in previous:
        following = []
        for node in frontier:
            for nxt, row in successors.get(node, []):
                if nxt not in previous:
                    previous[nxt] = (node, row)
                    following.append(nxt)
        frontier = following
    path, rows, node = [], [], goal
    while node != start and previous.get(node) is not None:
        path.append(node)
        node, row = previous[node]
        rows.append(int(row))
    return [start, *reversed(path)] if start != goal else [goal], rows


# ---------------------------------------------------------------------------
# which kind of file is this?


def detect_file_kind(raw: RawTable) -> str:
    """Tell from a file's columns (and a template's meta) which kind of input it is.

    Returns one of "forecast", "events", "actuals", "items", "locations",
    "bom".  A ``kind`` key in a template's meta wins.  Columns that fit both
    a forecast and monthly actuals (item, location, period, quantity) count
    as a forecast: order history normally comes as dated lines, and monthly
    history mistaken for a forecast is refused by the horizon check, row by
    row, instead of being stored.  Columns that fit no kind are refused.
    """
    columns = set(raw.frame.columns)
    meta_kind = str(raw.meta.get("kind", "")).strip().lower()
    if meta_kind in FILE_KINDS:
        return meta_kind
    if {"parent", "component"} <= columns:
        return "bom"
    if "event" in columns or columns & {"uplift_pct", "units"}:
        return "events"
    if "date" in columns and "quantity" in columns:
        return "actuals"
    numbers = columns & {"quantity", "value"}
    times = columns & {"period", "week"}
    if numbers and times:
        # item, location, period, quantity fits monthly actuals too; actuals are loaded apart from
        # submissions, and a history file taken for a forecast fails the horizon check by name.
        return "forecast"
    if {"item", "family"} <= columns:
        return "items"
    if {"location", "region"} <= columns and "item" not in columns:
        return "locations"
    _refuse_kind(raw, "the columns of a forecast, events, actuals, items, locations or bom file")


def _refuse_kind(raw: RawTable, expected: str):
    name = raw.file or "input file"
    raise InputRejected(file=name, problems=[Problem(name, None, None, ", ".join(raw.frame.columns), expected)])
