"""Checking rows: every rule fed a small broken file, clean output typed, invariants."""

from __future__ import annotations

import datetime as dt
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from consensus.errors import InputRejected, InvalidSpec
from consensus.intake.checks import (
    DEFAULT_LIMITS,
    IntakeLimits,
    check_actual_rows,
    check_event_rows,
    check_forecast_rows,
    check_master_rows,
    detect_file_kind,
)
from consensus.intake.reader import RawTable, read_table
from consensus.periods import horizon_months

DATA = Path(__file__).parent / "data"
BAD, GOOD, HOSTILE = DATA / "bad", DATA / "good", DATA / "hostile"

ITEMS = pd.DataFrame(
    {
        "item": ["A100", "A200", "B100", "C100"],
        "family": ["FAM1", "FAM1", "FAM2", "FAM3"],
        "unit_price": [10.0, np.nan, np.nan, 4.5],
    }
)
LOCATIONS = pd.DataFrame({"location": ["L1", "L2", "L3"], "region": ["NORTH", "NORTH", "SOUTH"]})
HORIZONS = {"2026-11": horizon_months("2026-11", 18), "2026-12": horizon_months("2026-12", 18)}
DEFAULT_CYCLE = "2026-11"


def run_check(path: Path, *, default_cycle: str | None = DEFAULT_CYCLE, limits: IntakeLimits = DEFAULT_LIMITS):
    """Read a file and run the check its name starts with (forecast_, events_, actuals_, items_ …)."""
    raw = read_table(path)
    kind = path.name.split("_")[0].split(".")[0]
    if kind == "forecast":
        return check_forecast_rows(raw, filename=path.name, items=ITEMS, locations=LOCATIONS,
                                   horizons=HORIZONS, default_cycle=default_cycle, limits=limits)
    if kind == "events":
        return check_event_rows(raw, filename=path.name, items=ITEMS, locations=LOCATIONS,
                                horizons=HORIZONS, default_cycle=default_cycle, limits=limits)
    if kind == "actuals":
        return check_actual_rows(raw, filename=path.name, items=ITEMS, locations=LOCATIONS, limits=limits)
    return check_master_rows(raw, filename=path.name, kind=kind, limits=limits)


# One line per expected problem: file, row, column and the value as the user typed it, then the expectation.
# The whole list must match: a broken file yields exactly these problems and no others.
BAD_ROWS: dict[str, list[str]] = {
    "forecast_unknown_item.csv": ["forecast_unknown_item.csv, row 3, column 'item': got 'ZZ9'; expected an item code in the item master"],
    "forecast_unknown_family.csv": ["forecast_unknown_family.csv, row 3, column 'family': got 'FAM9'; expected a family code"],
    "forecast_unknown_location.csv": ["forecast_unknown_location.csv, row 3, column 'location': got 'L7'; expected a location code"],
    "forecast_unknown_region.csv": ["forecast_unknown_region.csv, row 3, column 'region': got 'WEST'; expected a region code"],
    "forecast_bad_period.csv": [
        "forecast_bad_period.csv, row 2, column 'period': got '2027-13'; expected a month in YYYY-MM form",
        "forecast_bad_period.csv, row 3, column 'period': got '2027/01'",
        "forecast_bad_period.csv, row 4, column 'period': got 'Jan 2027'",
    ],
    # ISO 8601: 2027 has 52 weeks (it starts on a Friday), so 2027-W53 does not exist.
    "forecast_bad_week.csv": [
        "forecast_bad_week.csv, row 2, column 'week': got '2027-W54'; expected an ISO week in YYYY-Www form",
        "forecast_bad_week.csv, row 3, column 'week': got '2027-W53'",
        "forecast_bad_week.csv, row 4, column 'week': got '2027W05'",
    ],
    "forecast_out_of_horizon.csv": [
        "forecast_out_of_horizon.csv, row 3, column 'period': got '2028-06'; expected a month in the horizon 2026-12 … 2028-05",
        "forecast_out_of_horizon.csv, row 4, column 'period': got '2026-11'; expected a month in the horizon 2026-12 … 2028-05",
    ],
    # 2026-W48 runs Mon 23 – Sun 29 Nov 2026, wholly in the cycle month; 2026-W49 reaches into December.
    "forecast_week_outside_horizon.csv": [
        "forecast_week_outside_horizon.csv, row 3, column 'week': got '2026-W48'; expected a week overlapping the horizon 2026-12 … 2028-05",
    ],
    "forecast_duplicate_key.csv": [
        "forecast_duplicate_key.csv, row 4, column 'period': got '2026-11 / item=A100 / location=L1 / period=2026-12'; "
        "expected one row per cycle, item or family, location or region, and period or week; the same one is already at row 2",
    ],
    "forecast_negative.csv": ["forecast_negative.csv, row 3, column 'quantity': got '-2'; expected a quantity of 0 or more"],
    "forecast_non_numeric.csv": [
        "forecast_non_numeric.csv, row 2, column 'quantity': got '12,5'; expected a number written with '.' for decimals",
        "forecast_non_numeric.csv, row 3, column 'quantity': got 'twelve'",
        "forecast_non_numeric.csv, row 4, column 'quantity': got '1 000'",
    ],
    "forecast_nan_inf.csv": [
        "forecast_nan_inf.csv, row 2, column 'quantity': got 'NaN'; expected a number, not a missing-value marker",
        "forecast_nan_inf.csv, row 3, column 'quantity': got 'inf'; expected a finite number",
        "forecast_nan_inf.csv, row 4, column 'quantity': got '1e400'; expected a finite number",  # overflows IEEE 754 double
    ],
    "forecast_value_unpriced.csv": [
        "forecast_value_unpriced.csv, row 3, column 'value': got '500'; expected a quantity instead: item 'A200' has no unit price",
        "forecast_value_unpriced.csv, row 4, column 'value': got '500'; expected a quantity instead: family 'FAM2' has no priced item",
    ],
    "forecast_item_and_family.csv": [
        "forecast_item_and_family.csv, row 2, column 'family': got 'FAM1'; expected either 'item' or 'family' in a row, not both",
    ],
    "forecast_neither_item_nor_family.csv": [
        "forecast_neither_item_nor_family.csv, row 3, column 'item': got ''; expected a value in 'item' or in 'family'",
    ],
    "forecast_missing_column.csv": ["forecast_missing_column.csv, column 'quantity'; expected a column 'quantity' or 'value'"],
    "forecast_unknown_cycle.csv": [
        "forecast_unknown_cycle.csv, row 3, column 'cycle': got '2025-01'; expected one of the open cycles (2026-11, 2026-12)",
        "forecast_unknown_cycle.csv, row 4, column 'cycle': got '2026-1'; expected a cycle month in YYYY-MM form",
    ],
    "forecast_no_cycle.csv": ["forecast_no_cycle.csv, row 2, column 'cycle': got ''; expected a cycle month (YYYY-MM) in this column or given on submit"],
    "forecast_location_and_region.csv": ["forecast_location_and_region.csv, row 2, column 'region': got 'NORTH'; expected either 'location' or 'region'"],
    "forecast_quantity_and_value.csv": ["forecast_quantity_and_value.csv, row 2, column 'value': got '50'; expected either 'quantity' or 'value'"],
    "forecast_blank_quantity.csv": ["forecast_blank_quantity.csv, row 3, column 'quantity': got ''; expected a value in 'quantity' or in 'value'"],
    # Row 3 of the sheet is empty; the mid-month date stays a date and is reported, not cut to a month.
    "forecast_mid_month_date.xlsx": ["forecast_mid_month_date.xlsx, row 4, column 'period': got '2027-04-15'; expected a month in YYYY-MM form"],
    "events_start_after_end.csv": ["events_start_after_end.csv, row 2, column 'end': got '2027-03'; expected an end month on or after the start 2027-05"],
    "events_bad_month.csv": ["events_bad_month.csv, row 2, column 'start': got '2027-3'; expected a month in YYYY-MM form"],
    "events_uplift_too_low.csv": ["events_uplift_too_low.csv, row 2, column 'uplift_pct': got '-100'; expected an uplift above -100 percent"],
    "events_both_effects.csv": ["events_both_effects.csv, row 2, column 'units': got '200'; expected either 'uplift_pct' or 'units' in a row, not both"],
    "events_no_effect.csv": ["events_no_effect.csv, row 2, column 'uplift_pct': got ''; expected a value in 'uplift_pct' or in 'units'"],
    "events_outside_horizon.csv": ["events_outside_horizon.csv, row 2, column 'start': got '2026-01'; expected an event overlapping the horizon 2026-12 … 2028-05"],
    "events_missing_column.csv": ["events_missing_column.csv, column 'end'; expected a column 'end'"],
    "events_unknown_item.csv": ["events_unknown_item.csv, row 2, column 'item': got 'X999'; expected an item code in the item master"],
    "events_no_name.csv": ["events_no_name.csv, row 2, column 'event': got ''; expected an event name"],
    "events_duplicate.csv": ["events_duplicate.csv, row 3, column 'event': got '2026-11 / Spring promo / item=A100 / location=L1 / 2027-03'; expected one row per cycle, event"],
    # 2026 is not a leap year, so 30 February does not exist (Gregorian calendar).
    "actuals_bad_date.csv": [
        "actuals_bad_date.csv, row 2, column 'date': got '2026-02-30'; expected a calendar date in YYYY-MM-DD form",
        "actuals_bad_date.csv, row 3, column 'date': got '03/04/2026'",
    ],
    "actuals_negative.csv": ["actuals_negative.csv, row 2, column 'quantity': got '-1'; expected a quantity of 0 or more"],
    "actuals_unknown_location.csv": ["actuals_unknown_location.csv, row 2, column 'location': got 'L9'; expected a location code in the location master"],
    "actuals_duplicate_monthly.csv": ["actuals_duplicate_monthly.csv, row 3, column 'period': got 'A100 / L1 / 2026-09'; expected one row per item, location and month in monthly totals; the same one is already at row 2"],
    "actuals_mixed_grain.csv": ["actuals_mixed_grain.csv, row 3, column 'period': got '2026-09'; expected either order lines with dates or a monthly total"],
    "actuals_missing_column.csv": ["actuals_missing_column.csv, column 'date'; expected a column 'date' or 'period'"],
    "actuals_infinite.csv": ["actuals_infinite.csv, row 2, column 'quantity': got '-inf'; expected a finite number"],
    "items_duplicate.csv": ["items_duplicate.csv, row 3, column 'item': got 'a100'; expected one row per item code (compared ignoring case); the same one is already at row 2"],
    "items_negative_price.csv": ["items_negative_price.csv, row 2, column 'unit_price': got '-10'; expected a unit price of 0 or more"],
    "items_missing_column.csv": ["items_missing_column.csv, column 'family'; expected a column 'family'"],
    "items_blank_family.csv": ["items_blank_family.csv, row 2, column 'family': got ''; expected a family code"],
    "locations_duplicate.csv": ["locations_duplicate.csv, row 3, column 'location': got 'L1'; expected one row per location code"],
    "locations_blank_region.csv": ["locations_blank_region.csv, row 2, column 'region': got ''; expected a region code"],
    "bom_cycle.csv": [
        "bom_cycle.csv, row 2, column 'component': got 'B'; expected no cycle in the bill of materials; this line closes A → B → A (rows 2, 4)",
        "bom_cycle.csv, row 4, column 'component': got 'A'; expected no cycle in the bill of materials; this line closes B → A → B (rows 2, 4)",
    ],
    "bom_cycle_three.csv": [
        "bom_cycle_three.csv, row 2, column 'component': got 'B'; expected no cycle in the bill of materials; this line closes A → B → C → A (rows 2, 3, 4)",
        "bom_cycle_three.csv, row 3, column 'component': got 'C'",
        "bom_cycle_three.csv, row 4, column 'component': got 'A'; expected no cycle in the bill of materials; this line closes C → A → B → C",
    ],
    "bom_self_loop.csv": ["bom_self_loop.csv, row 2, column 'component': got 'A'; expected no cycle in the bill of materials; this line closes A → A (row 2)"],
    "bom_qty_zero.csv": ["bom_qty_zero.csv, row 2, column 'qty_per': got '0'; expected a quantity per parent above 0"],
    "bom_lead_fraction.csv": ["bom_lead_fraction.csv, row 2, column 'lead_time_months': got '1.5'; expected a whole number"],
    "bom_lead_negative.csv": ["bom_lead_negative.csv, row 2, column 'lead_time_months': got '-1'; expected a lead time of 0 months or more"],
    "bom_duplicate_pair.csv": ["bom_duplicate_pair.csv, row 3, column 'component': got 'A / B'; expected one row per parent and component pair; the same one is already at row 2"],
}


def test_every_broken_check_file_has_an_expectation():
    on_disk = {p.name for p in BAD.iterdir() if not p.name.startswith("read_")}
    assert on_disk == set(BAD_ROWS)


@pytest.mark.slow
@pytest.mark.parametrize("name", sorted(BAD_ROWS))
def test_broken_file_yields_exactly_its_problems(name):
    result = run_check(BAD / name, default_cycle=None if "no_cycle" in name else DEFAULT_CYCLE)
    shown = [str(p) for p in result.problems]
    expected = BAD_ROWS[name]
    assert result.total_problems == len(expected), shown
    for line, wanted in zip(shown, expected):
        assert line.startswith(wanted) or wanted in line, (line, wanted)
    with pytest.raises(InputRejected) as caught:
        result.raise_if_problems(name)
    assert caught.value.total_problems == len(expected)


def test_good_forecast_is_clean_and_typed():
    result = run_check(GOOD / "forecast.csv")
    assert result.is_clean and result.warnings == []  # last_consensus is ignored quietly
    clean = result.clean
    assert list(clean.columns) == ["row", "cycle", "item", "family", "location", "region", "period", "week",
                                   "quantity", "value", "note"]
    assert clean["row"].tolist() == [2, 3, 4, 5, 6]
    assert clean["cycle"].tolist() == ["2026-11"] * 5
    assert clean["item"].isna().tolist() == [False, False, True, False, True]
    assert clean.loc[2, "family"] == "FAM2" and clean.loc[2, "region"] == "NORTH" and pd.isna(clean.loc[2, "location"])
    assert pd.isna(clean.loc[3, "location"]) and pd.isna(clean.loc[3, "region"])  # neither: every location
    assert clean["quantity"].dtype == float and clean["value"].dtype == float
    assert clean.loc[3, "value"] == 90.0 and np.isnan(clean.loc[3, "quantity"])
    assert clean["quantity"].fillna(-1).tolist() == [120.0, 130.0, 40.0, -1, 0.0]
    assert clean["week"].isna().all()
    assert clean.loc[0, "note"] == "steady" and clean.loc[3, "note"] == "money"
    assert clean["note"].isna().tolist() == [False, True, True, False, True]


def test_weekly_forecast_with_cycle_column():
    result = run_check(GOOD / "forecast_weeks.csv")
    assert result.is_clean
    assert result.clean["week"].tolist() == ["2026-W53", "2026-W49", "2027-W01"]
    assert result.clean["cycle"].tolist() == ["2026-11", "2026-11", "2026-12"]
    assert result.clean["period"].isna().all()


def test_codes_matched_ignoring_case_take_the_master_spelling_and_warn():
    result = run_check(GOOD / "forecast_extra_column.csv")
    assert result.is_clean
    assert result.clean.loc[0, "item"] == "A100" and result.clean.loc[0, "location"] == "L1"
    warnings = [str(w) for w in result.warnings]
    assert any("column 'comment'" in w and "ignored" in w for w in warnings)
    assert any("column 'item': got 'a100'" in w and "read as the master's 'A100'" in w for w in warnings)
    assert any("column 'location': got 'l1'" in w for w in warnings)


def test_code_that_matches_two_master_codes_ignoring_case_is_unknown():
    items = pd.DataFrame({"item": ["Ab", "AB"], "family": ["F", "F"], "unit_price": [1.0, 1.0]})
    raw = _raw({"item": ["ab", "AB"], "period": ["2026-12", "2026-12"], "quantity": ["1", "2"]})
    result = check_forecast_rows(raw, filename="f.csv", items=items, locations=LOCATIONS, horizons=HORIZONS,
                                 default_cycle=DEFAULT_CYCLE)
    assert [str(p) for p in result.problems] == ["f.csv, row 2, column 'item': got 'ab'; expected an item code in the item master"]
    assert result.clean["item"].tolist() == ["AB"]


def test_unknown_code_names_the_nearest_master_code():
    # A one-letter slip gets the master's nearest code (difflib's ratio ≥ 0.8, Python standard library);
    # a code near nothing gets the plain message.
    items = pd.DataFrame({"item": ["A100"], "family": ["VALVE-KITS"], "unit_price": [1.0]})
    raw = _raw({"family": ["VALVE-KTS", "QQQ"], "location": ["L1", "L1"], "period": ["2026-12", "2026-12"],
                "quantity": ["1", "2"]})
    result = check_forecast_rows(raw, filename="f.csv", items=items, locations=LOCATIONS, horizons=HORIZONS,
                                 default_cycle=DEFAULT_CYCLE)
    assert [str(p) for p in result.problems] == [
        "f.csv, row 2, column 'family': got 'VALVE-KTS'; expected a family code in the item master; "
        "did you mean 'VALVE-KITS'?",
        "f.csv, row 3, column 'family': got 'QQQ'; expected a family code in the item master"]


def test_good_events():
    result = run_check(GOOD / "events.csv")
    assert result.is_clean
    clean = result.clean
    assert list(clean.columns) == ["row", "cycle", "event", "item", "family", "location", "region", "start", "end",
                                   "uplift_pct", "units", "note"]
    assert clean["uplift_pct"].fillna(0).tolist() == [15.0, -5.0, 0.0]
    assert clean["units"].fillna(0).tolist() == [0.0, 0.0, 300.0]
    assert clean.loc[1, "family"] == "FAM1" and clean.loc[1, "region"] == "NORTH"


def test_daily_actuals_are_summed_by_month():
    result = run_check(GOOD / "actuals_daily.csv")
    assert result.is_clean
    # Hand-summed from the file: 5 + 7 in October; 2 in November at L1.
    expected = pd.DataFrame(
        {"item": ["A100", "A100", "A100", "C100"], "location": ["L1", "L1", "L2", "L3"],
         "period": ["2026-10", "2026-11", "2026-11", "2026-11"], "quantity": [12.0, 2.0, 0.0, 1.5]}
    )
    pd.testing.assert_frame_equal(result.clean.astype({"item": str, "location": str, "period": str}), expected)


def test_monthly_actuals_pass_through():
    result = run_check(GOOD / "actuals_monthly.csv")
    assert result.is_clean
    assert result.clean["quantity"].sum() == 84.0
    assert len(result.clean) == 3


def test_actuals_sum_matches_a_plain_groupby(tmp_path):
    """The monthly buckets equal pandas' own groupby over parsed dates (reference: pandas resample semantics)."""
    rng = np.random.default_rng(7)
    count = 2_000
    days = pd.Timestamp("2025-01-01") + pd.to_timedelta(rng.integers(0, 700, count), unit="D")
    frame = pd.DataFrame(
        {"item": rng.choice(["A100", "A200", "C100"], count), "location": rng.choice(["L1", "L2"], count),
         "date": days.strftime("%Y-%m-%d"), "quantity": rng.integers(0, 50, count).astype(str)}
    )
    path = tmp_path / "actuals.csv"
    frame.to_csv(path, index=False)
    result = check_actual_rows(read_table(path), filename=path.name, items=ITEMS, locations=LOCATIONS)
    reference = (
        frame.assign(period=days.to_period("M").astype(str), quantity=frame["quantity"].astype(float))
        .groupby(["item", "location", "period"], as_index=False)["quantity"].sum()
    )
    assert result.is_clean
    assert result.clean["quantity"].to_numpy().tolist() == reference["quantity"].tolist()
    assert result.clean["period"].astype(str).tolist() == reference["period"].tolist()


def test_good_masters():
    items = run_check(GOOD / "items.csv")
    assert items.is_clean
    assert list(items.clean.columns) == ["item", "family", "unit_price", "description"]
    assert items.clean["unit_price"].fillna(-1).tolist() == [10.0, -1, -1, 4.5]
    locations = run_check(GOOD / "locations.csv")
    assert locations.is_clean and locations.clean["region"].tolist() == ["NORTH", "NORTH", "SOUTH"]
    bom = run_check(GOOD / "bom.csv")
    assert bom.is_clean
    assert bom.clean["lead_time_months"].dtype.kind == "i"
    assert bom.clean["qty_per"].tolist() == [2.0, 1.5, 1.0]


def test_master_kind_is_a_closed_set():
    with pytest.raises(InvalidSpec, match="kind must be one of"):
        check_master_rows(read_table(GOOD / "items.csv"), filename="items.csv", kind="products")


def test_a_frame_without_rows_is_a_file_problem():
    raw = _raw({"item": [], "period": [], "quantity": []})
    result = check_forecast_rows(raw, filename="none.csv", items=ITEMS, locations=LOCATIONS, horizons=HORIZONS,
                                 default_cycle=DEFAULT_CYCLE)
    assert [str(p) for p in result.problems] == ["none.csv; expected at least one data row; the file has none"]
    assert len(result.clean) == 0


def test_ten_thousand_rows_all_checked_and_list_capped(tmp_path):
    count = 10_000
    codes = [f"I{i:04d}" for i in range(1_000)]
    items = pd.DataFrame({"item": codes, "family": "FAM", "unit_price": 1.0})
    index = np.arange(count)
    quantity = (index % 50).astype(str).astype(object)
    quantity[index % 7 == 3] = "-1"
    item = np.array(codes, dtype=object)[index % 1_000]
    item[index % 1_000 == 999] = "NOPE"
    frame = pd.DataFrame({"item": item, "location": "L1",
                          "period": np.array(HORIZONS[DEFAULT_CYCLE])[index // 1_000], "quantity": quantity})
    path = tmp_path / "big.csv"
    frame.to_csv(path, index=False)
    result = check_forecast_rows(read_table(path), filename=path.name, items=items, locations=LOCATIONS,
                                 horizons=HORIZONS, default_cycle=DEFAULT_CYCLE)
    negative, unknown = index % 7 == 3, index % 1_000 == 999
    assert result.total_problems == int(negative.sum() + unknown.sum())
    assert len(result.problems) == 50
    rows = [p.row for p in result.problems]
    assert rows == sorted(rows) and rows[0] == 3 + 2  # index 3 is spreadsheet row 5
    assert len(result.clean) == count - int((negative | unknown).sum())


def test_detect_file_kind_from_columns():
    assert detect_file_kind(read_table(GOOD / "forecast.csv")) == "forecast"
    assert detect_file_kind(read_table(GOOD / "forecast_weeks.csv")) == "forecast"
    assert detect_file_kind(read_table(GOOD / "events.csv")) == "events"
    assert detect_file_kind(read_table(GOOD / "actuals_daily.csv")) == "actuals"
    assert detect_file_kind(read_table(GOOD / "items.csv")) == "items"
    assert detect_file_kind(read_table(GOOD / "locations.csv")) == "locations"
    assert detect_file_kind(read_table(GOOD / "bom.csv")) == "bom"


def test_monthly_actuals_taken_for_a_forecast_fail_the_horizon_check():
    raw = read_table(GOOD / "actuals_monthly.csv")
    assert detect_file_kind(raw) == "forecast"
    result = check_forecast_rows(raw, filename="actuals_monthly.csv", items=ITEMS, locations=LOCATIONS,
                                 horizons=HORIZONS, default_cycle=DEFAULT_CYCLE)
    assert result.total_problems == 3
    assert all("the horizon 2026-12 … 2028-05" in p.expected for p in result.problems)
    assert detect_file_kind(_raw(raw.frame.to_dict("list"), meta={"kind": "actuals"})) == "actuals"
    with pytest.raises(InputRejected, match="the columns of a forecast"):
        detect_file_kind(_raw({"colour": ["red"]}))


# ---- hostile files: absurd numbers, future history, formula codes, optional columns ---------------
# Fixed limits, so the expectations do not move with the calendar (the default latest month is today's).
LIMITS = IntakeLimits(latest_actual_month="2026-12")
FORMULA_CODE = "expected a code that does not start with '=', '+', '-', '@', a tab or a carriage return"
HOSTILE_ROWS: dict[str, list[str]] = {
    # 1e308 is finite (IEEE 754 doubles reach about 1.8e308) but two of them sum to inf: the limit is 10^9.
    "forecast_huge_quantity.csv": [
        "forecast_huge_quantity.csv, row 2, column 'quantity': got '1e308'; expected a quantity of at most 1,000,000,000",
        "forecast_huge_quantity.csv, row 3, column 'quantity': got '1000000001'; expected a quantity of at most 1,000,000,000",
    ],
    "actuals_huge_quantity.csv": [
        "actuals_huge_quantity.csv, row 2, column 'quantity': got '1e308'; expected a quantity of at most 1,000,000,000",
        "actuals_huge_quantity.csv, row 3, column 'quantity': got '1e308'",
    ],
    "items_huge_price.csv": ["items_huge_price.csv, row 2, column 'unit_price': got '1e308'; expected a unit price of at most 1,000,000,000"],
    "bom_huge_numbers.csv": [
        "bom_huge_numbers.csv, row 2, column 'qty_per': got '1e308'; expected a quantity per parent of at most 1,000,000",
        "bom_huge_numbers.csv, row 3, column 'lead_time_months': got '1000000'; expected a lead time of at most 120 months",
    ],
    # The horizon of cycle 2026-11 is 2026-12 … 2028-05; 24 months either side reach 2024-12 and 2030-05.
    "events_huge_effects.csv": [
        "events_huge_effects.csv, row 2, column 'uplift_pct': got '1e308'; expected an uplift of at most 10,000 percent",
        "events_huge_effects.csv, row 3, column 'units': got '-1e308'; expected units between -1,000,000,000 and 1,000,000,000",
        "events_huge_effects.csv, row 4, column 'start': got '1900-01'; expected an event starting at most 24 months before the horizon, so not before 2024-12",
        "events_huge_effects.csv, row 4, column 'end': got '2099-12'; expected an event ending at most 24 months after the horizon, so not after 2030-05",
    ],
    "actuals_far_dates.csv": [
        "actuals_far_dates.csv, row 2, column 'date': got '2099-01-15'; expected a date in the months 1990-01 … 2026-12: orders cannot come from the future",
        "actuals_far_dates.csv, row 3, column 'date': got '1900-01-01'; expected a date in the months 1990-01 … 2026-12",
    ],
    # A distribution center's forecast has the very columns of monthly history: its months give it away.
    "actuals_is_a_forecast.csv": [
        "actuals_is_a_forecast.csv, column 'period'; expected order history up to 2026-12; 3 of 4 rows are for later months (2027-01 … 2027-03), so this looks like a forecast",
        "actuals_is_a_forecast.csv, row 2, column 'period': got '2027-01'; expected a month in 1990-01 … 2026-12: orders cannot come from the future",
        "actuals_is_a_forecast.csv, row 3, column 'period': got '2027-02'",
        "actuals_is_a_forecast.csv, row 4, column 'period': got '2027-03'",
    ],
    "actuals_with_cycle_column.csv": [
        "actuals_with_cycle_column.csv, column 'cycle'; expected order history (item, location, date or period, quantity), not a forecast; it has the column(s) 'cycle'",
    ],
    # OWASP, "CSV Injection": cells starting with =, +, -, @, tab or carriage return run as formulas.
    "forecast_formula_codes.csv": [
        "forecast_formula_codes.csv, row 2, column 'item': got '=HYPERLINK(\"http://x.invalid\")'; " + FORMULA_CODE,
        "forecast_formula_codes.csv, row 3, column 'location': got '+L1'; " + FORMULA_CODE,
    ],
    "items_formula_codes.csv": [
        "items_formula_codes.csv, row 2, column 'item': got '@A1'; " + FORMULA_CODE,
        "items_formula_codes.csv, row 3, column 'family': got '-FAM'; " + FORMULA_CODE,
    ],
    "bom_formula_codes.csv": [
        "bom_formula_codes.csv, row 2, column 'parent': got '=A'; " + FORMULA_CODE,
        "bom_formula_codes.csv, row 3, column 'component': got '+B'; " + FORMULA_CODE,
    ],
    "events_formula_name.csv": ["events_formula_name.csv, row 2, column 'event': got '=Spring promo'; " + FORMULA_CODE],
    "items_no_description.csv": [],
    "locations_no_description.csv": [],
}


def test_every_hostile_check_file_has_an_expectation():
    assert {p.name for p in HOSTILE.glob("*.csv")} == set(HOSTILE_ROWS)


@pytest.mark.parametrize("name", sorted(HOSTILE_ROWS))
def test_hostile_file_yields_exactly_its_problems(name):
    result = run_check(HOSTILE / name, limits=LIMITS)
    shown = [str(p) for p in result.problems]
    expected = HOSTILE_ROWS[name]
    assert result.total_problems == len(expected), shown
    for line, wanted in zip(shown, expected):
        assert line.startswith(wanted), (line, wanted)


@pytest.mark.parametrize("text, allowed", [("1000000000", True), ("1e9", True), ("1000000000.5", False),
                                           ("1.7976931348623157e308", False), ("0", True)])
def test_the_quantity_limit_is_inclusive_and_every_kind_applies_it(text, allowed):
    """At most 10^9 units a row, by default, for forecasts and order history alike (IntakeLimits)."""
    forecast = _raw({"item": ["A100"], "period": ["2026-12"], "quantity": [text]})
    actuals = _raw({"item": ["A100"], "location": ["L1"], "period": ["2026-10"], "quantity": [text]})
    assert run_raw(forecast, "forecast").is_clean == allowed
    assert run_raw(actuals, "actuals").is_clean == allowed


def run_raw(raw: RawTable, kind: str, *, limits: IntakeLimits = LIMITS):
    if kind == "forecast":
        return check_forecast_rows(raw, items=ITEMS, locations=LOCATIONS, horizons=HORIZONS,
                                   default_cycle=DEFAULT_CYCLE, limits=limits)
    return check_actual_rows(raw, items=ITEMS, locations=LOCATIONS, limits=limits)


def test_limits_are_settings_a_larger_business_raises():
    raw = _raw({"item": ["A100"], "period": ["2026-12"], "value": ["5e12"]})
    assert not run_raw(raw, "forecast").is_clean
    assert run_raw(raw, "forecast", limits=IntakeLimits(max_forecast_value=1e13)).is_clean
    history = _raw({"item": ["A100"], "location": ["L1"], "date": ["1985-06-30"], "quantity": ["1"]})
    assert not run_raw(history, "actuals").is_clean
    assert run_raw(history, "actuals", limits=IntakeLimits(earliest_actual_month="1980-01",
                                                           latest_actual_month="2026-12")).is_clean


def test_every_clean_number_sums_to_a_finite_total():
    """What the limits are for: a file's clean numbers, however many, add up without overflow (IEEE 754)."""
    count = 2_000
    raw = _raw({"item": ["A100"] * count, "location": ["L1"] * count,
                "date": (pd.Timestamp("2026-01-01") + pd.to_timedelta(np.arange(count) % 300, unit="D"))
                .strftime("%Y-%m-%d").tolist(),
                "quantity": (["1e9", "1e308", "1.7e308", "9e15"] * (count // 4))})
    result = run_raw(raw, "actuals")
    assert result.total_problems == count // 2 + count // 4
    assert np.isfinite(result.clean["quantity"].sum()) and result.clean["quantity"].max() <= 1e9 * count


def test_the_latest_order_month_is_by_default_this_calendar_month():
    today = dt.date.today()
    this_month = f"{today.year:04d}-{today.month:02d}"
    next_month = (pd.Period(this_month, "M") + 1).strftime("%Y-%m")
    assert DEFAULT_LIMITS.actual_months()[1] == this_month
    raw = _raw({"item": ["A100", "A100"], "location": ["L1", "L1"], "period": [this_month, next_month],
                "quantity": ["1", "1"]})
    result = check_actual_rows(raw, items=ITEMS, locations=LOCATIONS)
    assert [p.row for p in result.problems] == [3]
    assert "orders cannot come from the future" in result.problems[0].expected


def test_a_forecast_template_given_as_actuals_is_refused_whole():
    raw = _raw({"item": ["A100"], "location": ["L1"], "period": ["2026-10"], "quantity": ["3"]},
               meta={"source": "dc", "cycle": "2026-11"})
    result = run_raw(raw, "actuals")
    assert result.total_problems == 1 and result.problems[0].row is None
    assert "it is a template, with source 'dc', cycle '2026-11'" in result.problems[0].expected


def test_a_demo_distribution_center_forecast_is_refused_by_the_actuals_check():
    """The bundled sample company's DC forecast (792 rows, item, location, period, quantity), given as actuals."""
    path = DATA.parent.parent / "sample_inputs" / "current" / "dc_n1.csv"
    master = pd.read_csv(DATA.parent.parent / "sample_inputs" / "master" / "items.csv", dtype=str)
    places = pd.read_csv(DATA.parent.parent / "sample_inputs" / "master" / "locations.csv", dtype=str)
    result = check_actual_rows(read_table(path), items=master, locations=places,
                               limits=IntakeLimits(latest_actual_month="2026-11"))
    assert result.total_problems == 1 + 792
    assert result.problems[0].row is None and "looks like a forecast" in result.problems[0].expected


@pytest.mark.parametrize("code", ["=A1", "+A1", "-A1", "@A1", "\tA1", "\rA1"])
@pytest.mark.parametrize("column", ["item", "family"])
def test_every_formula_start_is_refused_in_master_codes(code, column):
    """The general rule behind the files above, on the OWASP list of formula starts."""
    raw = _raw({"item": ["OK1"], "family": ["FAM"], column: [code]})  # built by hand: the reader would strip a tab
    result = check_master_rows(raw, kind="items")
    assert [p.column for p in result.problems] == [column]
    assert result.problems[0].expected.startswith("a code that does not start with")


def test_codes_with_formula_characters_inside_are_fine():
    raw = _raw({"item": ["A-100", "B+2", "C@3", "D=4"], "family": ["F-1"] * 4})
    assert check_master_rows(raw, kind="items").is_clean


def test_free_text_is_kept_and_the_tools_own_escape_is_removed():
    """Notes and descriptions are free text: kept as received; "'=" (the tool's CSV escape) reads back as "="."""
    raw = _raw({"item": ["A100", "A200"], "period": ["2026-12", "2026-12"], "quantity": ["1", "2"],
                "note": ["=1+1", "'@team"]})
    assert run_raw(raw, "forecast").clean["note"].tolist() == ["=1+1", "@team"]
    items = _raw({"item": ["A1", "A2"], "family": ["F", "F"], "description": ["-5% pack", "'+ spare"]})
    assert check_master_rows(items, kind="items").clean["description"].tolist() == ["-5% pack", "+ spare"]


def test_master_clean_frame_always_carries_a_description():
    for kind, columns in (("items", {"item": ["A1"], "family": ["F"]}), ("locations", {"location": ["L1"], "region": ["R"]})):
        clean = check_master_rows(_raw(columns), kind=kind).clean
        assert clean["description"].tolist() == [""] and clean["description"].notna().all()
        blank = check_master_rows(_raw({**columns, "description": [""]}), kind=kind).clean
        assert blank["description"].tolist() == [""]


@settings(max_examples=40, deadline=None)
@given(numbers=st.lists(st.floats(allow_nan=True, allow_infinity=True, width=64), min_size=1, max_size=20))
def test_a_number_is_accepted_exactly_when_finite_and_within_its_limit(numbers):
    """Oracle: Python's float() of the cell text and IEEE 754 finiteness (math.isfinite), row by row."""
    texts = [repr(x) for x in numbers]
    raw = _raw({"item": ["A100"] * len(texts), "location": ["L1"] * len(texts), "date": ["2026-10-01"] * len(texts),
                "quantity": texts})
    result = check_actual_rows(raw, items=ITEMS, locations=LOCATIONS, limits=LIMITS, max_problems=100)
    allowed = [math.isfinite(float(t)) and 0 <= float(t) <= LIMITS.max_actual_quantity for t in texts]
    assert result.total_problems == allowed.count(False)
    assert [p.row for p in result.problems] == [row for row, ok in enumerate(allowed, start=2) if not ok]
    assert math.isfinite(result.clean["quantity"].sum())


@pytest.mark.parametrize("options", [{"max_forecast_quantity": 0}, {"max_unit_price": float("inf")},
                                     {"max_qty_per": float("nan")}, {"max_actual_quantity": True},
                                     {"earliest_actual_month": "1990-13"}, {"latest_actual_month": "2026-1"},
                                     {"earliest_actual_month": "2027-01", "latest_actual_month": "2026-12"},
                                     {"event_months_outside_horizon": -1}, {"max_lead_time_months": "120"}])
def test_limits_are_checked_when_made(options):
    with pytest.raises(InvalidSpec):
        IntakeLimits(**options)


# ---- property tests -------------------------------------------------------


def _raw(columns: dict[str, list], *, meta: dict | None = None) -> RawTable:
    frame = pd.DataFrame({k: pd.Series(v, dtype="str") for k, v in columns.items()})
    return RawTable(frame=frame, rows=np.arange(2, len(frame) + 2), columns_seen=tuple(frame.columns),
                    file_format={"kind": "csv", "encoding": "utf-8", "delimiter": ",", "sheet": None},
                    meta=meta or {}, file="test.csv")


FORECAST_ROW = st.tuples(
    st.sampled_from(["A100", "A200", "C100", "ZZ"]),
    st.sampled_from(["L1", "L2", "L3", ""]),
    st.sampled_from(HORIZONS[DEFAULT_CYCLE][:4] + ["2030-01", "2027-13"]),
    st.sampled_from(["0", "3", "12.5", "-1", "x", "inf", ""]),
)


def _forecast_result(rows):
    raw = _raw({"item": [r[0] for r in rows], "location": [r[1] for r in rows],
                "period": [r[2] for r in rows], "quantity": [r[3] for r in rows]})
    return check_forecast_rows(raw, filename="p.csv", items=ITEMS, locations=LOCATIONS, horizons=HORIZONS,
                               default_cycle=DEFAULT_CYCLE, max_problems=10_000)


@pytest.mark.slow
@settings(max_examples=40, deadline=None)
@given(rows=st.lists(FORECAST_ROW, min_size=1, max_size=30))
def test_each_bad_cell_is_reported_once(rows):
    """Problems counted independently, cell by cell, in plain Python (common practice: brute-force oracle)."""
    horizon = set(HORIZONS[DEFAULT_CYCLE])
    expected = 0
    first_seen: dict[tuple, int] = {}
    duplicates = []
    for number, (item, location, period, quantity) in enumerate(rows, start=2):
        bad = 0
        bad += item == "ZZ"
        bad += period == "2027-13" or period not in horizon
        try:
            q = float(quantity)
            bad += not np.isfinite(q) or q < 0
        except ValueError:
            bad += 1
        expected += bad
        key = (item, location, period)
        if bad == 0:
            if key in first_seen:
                duplicates.append((number, first_seen[key]))
                expected += 1
            else:
                first_seen[key] = number
    result = _forecast_result(rows)
    assert result.total_problems == expected
    assert len(result.clean) == len(first_seen)
    reported = [(p.row, p.expected) for p in result.problems if "already at row" in p.expected]
    assert [(r, int(e.rsplit(" ", 1)[1])) for r, e in reported] == duplicates


@pytest.mark.slow
@settings(max_examples=20, deadline=None)
@given(rows=st.lists(FORECAST_ROW, min_size=1, max_size=20), seed=st.integers(0, 2**16))
def test_row_order_does_not_change_the_clean_set(rows, seed):
    """Reordering a file's rows only renumbers them: same clean records, same number of problems."""
    # Which of two rows with one key is reported depends on order by design, so keep one row per key.
    unique = list({row[:3]: row for row in rows}.values())
    shuffled = [unique[i] for i in np.random.default_rng(seed).permutation(len(unique))]
    one, two = _forecast_result(unique), _forecast_result(shuffled)
    records = lambda r: sorted(map(tuple, r.clean.drop(columns="row").astype(object).fillna("").astype(str).to_numpy().tolist()))  # noqa: E731
    assert records(one) == records(two)
    assert one.total_problems == two.total_problems


@pytest.mark.slow
@settings(max_examples=40, deadline=None)
@given(year=st.integers(1990, 2060), week=st.integers(0, 54))
def test_iso_weeks_accepted_exactly_when_the_calendar_has_them(year, week):
    """Oracle: Python's date.fromisocalendar, which implements ISO 8601 week dates."""
    try:
        monday = dt.date.fromisocalendar(year, week, 1)
        exists = True
    except ValueError:
        exists = False
    text = f"{year}-W{week:02d}"
    cycle = f"{monday.year:04d}-{monday.month:02d}" if exists else "2026-11"
    horizons = {cycle: horizon_months(cycle, 3), **HORIZONS}
    # The cycle is the week's own month, so an existing week overlaps the horizon only when it reaches the next month.
    raw = _raw({"item": ["A100"], "week": [text], "quantity": ["1"], "cycle": [cycle]})
    result = check_forecast_rows(raw, filename="w.csv", items=ITEMS, locations=LOCATIONS, horizons=horizons,
                                 default_cycle=None)
    malformed = any("ISO week" in p.expected for p in result.problems)
    assert malformed == (not exists)
    if exists:
        reaches_next_month = (monday + dt.timedelta(days=6)).month != monday.month
        assert result.is_clean == reaches_next_month


@settings(max_examples=30, deadline=None)
@given(edges=st.lists(st.tuples(st.sampled_from("ABCDEF"), st.sampled_from("ABCDEF")), min_size=1, max_size=12,
                      unique=True))
def test_bom_lines_on_a_cycle_match_transitive_closure(edges):
    """Oracle: a line u → v lies on a cycle iff v reaches u (Warshall 1962 transitive closure, in numpy)."""
    names = sorted({n for e in edges for n in e})
    at = {n: i for i, n in enumerate(names)}
    reach = np.eye(len(names), dtype=bool)
    for u, v in edges:
        reach[at[u], at[v]] = True
    for k in range(len(names)):
        reach |= reach[:, [k]] & reach[[k], :]
    expected_rows = [row for row, (u, v) in enumerate(edges, start=2) if reach[at[v], at[u]]]
    raw = _raw({"parent": [u for u, _ in edges], "component": [v for _, v in edges],
                "qty_per": ["1"] * len(edges), "lead_time_months": ["0"] * len(edges)})
    result = check_master_rows(raw, filename="bom.csv", kind="bom", max_problems=100)
    assert [p.row for p in result.problems] == expected_rows
    for problem in result.problems:
        path = problem.expected.split("closes ")[1].split(" (")[0].split(" → ")
        assert path[0] == path[-1]  # the spelled-out path is a closed cycle
        assert all((a, b) in set(edges) for a, b in zip(path, path[1:]))


def test_frozen_months_refuse_a_number_in_a_long_file_too():
    """cycle.frozen_months is one rule for both layouts: a long file (periods or weeks) cannot change a frozen month.

    Frozen near-term months are common practice (a planning time fence); the weeks are ISO 8601.
    """
    horizon = HORIZONS[DEFAULT_CYCLE]  # 2026-12 … : the first two are frozen below
    assert dt.date.fromisocalendar(2027, 4, 1) == dt.date(2027, 1, 25)  # W04: 25–31 Jan, in a frozen month
    assert dt.date.fromisocalendar(2027, 5, 1) == dt.date(2027, 2, 1)  # W05: 1–7 Feb, open
    raw = _raw({"item": ["A100"] * 6, "location": ["L1"] * 6,
                "period": [horizon[0], horizon[1], horizon[2], "", "", ""],
                "week": ["", "", "", "2027-W04", "2027-W05", "2027-W01"],
                "quantity": ["5", "6", "7", "8", "9", "10"]})
    result = check_forecast_rows(raw, filename="long.csv", items=ITEMS, locations=LOCATIONS, horizons=HORIZONS,
                                 default_cycle=DEFAULT_CYCLE, frozen_months=2)
    frozen = [p for p in result.problems if "frozen" in p.expected]
    assert [(p.row, p.column, p.value) for p in frozen] == [(2, "quantity", "5"), (3, "quantity", "6"),
                                                          (5, "quantity", "8"), (7, "quantity", "10")]
    assert frozen[0].expected == ("no number here: the first 2 months of the horizon are frozen "
                                  "(setting cycle.frozen_months) and keep the plan they have")
    assert check_forecast_rows(raw, filename="long.csv", items=ITEMS, locations=LOCATIONS, horizons=HORIZONS,
                               default_cycle=DEFAULT_CYCLE, frozen_months=0).is_clean
