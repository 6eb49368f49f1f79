"""Alignment: ISO 8601 calendar facts, stdlib calendar oracle, mix arithmetic by hand, split/convert invariants."""

from __future__ import annotations

import datetime as dt
import functools

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from consensus.errors import InvalidSpec
from consensus.methods.alignment import (MIX_LEVELS, historical_mix, iso_week_mondays, level_name, split_to_grain,
                                         spread_weeks, value_to_units, week_month_shares)
from consensus.periods import month_range

ITEMS = pd.DataFrame({"item": ["KIT-A", "KIT-B", "KIT-C", "PUMP-X", "PUMP-Y"],
                      "family": ["GARDEN-KITS", "GARDEN-KITS", "GARDEN-KITS", "PUMPS", "PUMPS"],
                      "unit_price": [10.0, 20.0, 40.0, 100.0, 300.0]})
LOCATIONS = pd.DataFrame({"location": ["DC-N1", "DC-N2", "DC-S1"], "region": ["NORTH", "NORTH", "SOUTH"]})


def shares_of(weeks):
    return week_month_shares(pd.Series(weeks)).set_index(["week", "period"])["share"]


# --- ISO 8601 calendar facts --------------------------------------------------------------------------

def test_2027_w01_runs_4_to_10_january():
    # ISO 8601: 2027-W01 is Monday 4 to Sunday 10 January 2027, wholly in January.
    assert iso_week_mondays(pd.Series(["2027-W01"]))[0] == np.datetime64("2027-01-04")
    assert shares_of(["2027-W01"]).to_dict() == {("2027-W01", "2027-01"): 1.0}


def test_2026_has_53_weeks_and_w53_straddles_new_year():
    # ISO 8601: 2026 has 53 weeks; 2026-W53 is 28 Dec 2026 – 3 Jan 2027: 4/7 December, 3/7 January.
    assert iso_week_mondays(pd.Series(["2026-W53"]))[0] == np.datetime64("2026-12-28")
    shares = shares_of(["2026-W53"])
    assert shares[("2026-W53", "2026-12")] == pytest.approx(4 / 7)
    assert shares[("2026-W53", "2027-01")] == pytest.approx(3 / 7)


def test_2025_w01_starts_in_december_2024():
    # ISO 8601: 2025-W01 starts Monday 30 December 2024 (2 days in December, 5 in January).
    assert iso_week_mondays(pd.Series(["2025-W01"]))[0] == np.datetime64("2024-12-30")
    shares = shares_of(["2025-W01"])
    assert shares[("2025-W01", "2024-12")] == pytest.approx(2 / 7)
    assert shares[("2025-W01", "2025-01")] == pytest.approx(5 / 7)


@pytest.mark.parametrize("week", ["2025-W53", "2027-W00", "2027-W54", "2027-1", "27-W01", "", "2027-W1"])
def test_weeks_that_do_not_exist_are_refused(week):
    # ISO 8601: 2025 has 52 weeks (1 Jan 2025 is a Wednesday in a non-leap year); weeks are two digits.
    with pytest.raises(ValueError):
        week_month_shares(pd.Series([week]))


iso_weeks = st.dates(min_value=dt.date(1990, 1, 1), max_value=dt.date(2090, 12, 31)).map(
    lambda d: "{:04d}-W{:02d}".format(*d.isocalendar()[:2]))


@settings(max_examples=40, deadline=None)
@given(weeks=st.lists(iso_weeks, min_size=1, max_size=20))
def test_week_shares_agree_with_the_stdlib_calendar(weeks):
    # Oracle: Python's datetime.date.fromisocalendar (ISO 8601) and counting the 7 days one by one.
    table = week_month_shares(pd.Series(weeks))
    assert set(table["week"]) == set(weeks)
    np.testing.assert_allclose(table.groupby("week")["share"].sum(), 1.0)
    for week in set(weeks):
        year, number = int(week[:4]), int(week[6:])
        monday = dt.date.fromisocalendar(year, number, 1)
        days = [monday + dt.timedelta(days=k) for k in range(7)]
        expected = pd.Series([f"{d.year:04d}-{d.month:02d}" for d in days]).value_counts() / 7
        got = table[table["week"] == week].set_index("period")["share"]
        pd.testing.assert_series_equal(got.sort_index(), expected.sort_index(), check_names=False)


@settings(max_examples=50, deadline=None)
@given(data=st.lists(st.tuples(iso_weeks, st.floats(0, 1e6), st.floats(0, 1e6)), min_size=1, max_size=25))
def test_spreading_weeks_then_summing_returns_the_original(data):
    rows = pd.DataFrame(data, columns=["week", "quantity", "value"]).assign(row_id=lambda d: np.arange(len(d)),
                                                                            source="dc")
    spread = spread_weeks(rows)
    totals = spread.groupby("row_id")[["quantity", "value"]].sum().sort_index()
    np.testing.assert_allclose(totals.to_numpy(), rows[["quantity", "value"]].to_numpy(), rtol=1e-12, atol=1e-9)
    assert (spread["source"] == "dc").all()
    np.testing.assert_allclose(spread.groupby("row_id")["week_share"].sum(), 1.0)


def test_spread_weeks_passes_monthly_rows_through():
    rows = pd.DataFrame({"row_id": [1, 2], "week": ["2026-W53", None], "period": [None, "2027-02"],
                         "quantity": [70.0, 5.0]})
    out = spread_weeks(rows).sort_values(["row_id", "period"]).reset_index(drop=True)
    assert out[["row_id", "period"]].values.tolist() == [[1, "2026-12"], [1, "2027-01"], [2, "2027-02"]]
    np.testing.assert_allclose(out["quantity"], [40.0, 30.0, 5.0])
    np.testing.assert_allclose(out["week_share"], [4 / 7, 3 / 7, 1.0])


# --- historical mix -------------------------------------------------------------------------------------

def flat_actuals(cycle="2026-11", months=12):
    """Constant monthly actuals per pair (invented numbers); PUMP-Y has none."""
    per_month = {("KIT-A", "DC-N1"): 10.0, ("KIT-A", "DC-N2"): 30.0, ("KIT-B", "DC-N1"): 20.0,
                 ("KIT-C", "DC-S1"): 40.0, ("PUMP-X", "DC-N1"): 5.0, ("PUMP-X", "DC-S1"): 15.0}
    first = month_range("2000-01", cycle)[-months]
    rows = [(i, l, p, q) for (i, l), q in per_month.items() for p in month_range(first, cycle)]
    return pd.DataFrame(rows, columns=["item", "location", "period", "quantity"])


def shares_at(mix, level, group_item, group_location):
    chosen = mix[(mix["level"] == level) & (mix["group_item"] == group_item) & (mix["group_location"] == group_location)]
    return chosen.set_index(["item", "location"])["share"]


def test_flat_mix_shares_are_quantity_ratios():
    mix = historical_mix(flat_actuals(), items=ITEMS, locations=LOCATIONS, cycle="2026-11")
    # Hand arithmetic: GARDEN-KITS × NORTH totals 10 + 30 + 20 = 60 a month.
    north = shares_at(mix, "family×region", "GARDEN-KITS", "NORTH")
    assert north[("KIT-A", "DC-N1")] == pytest.approx(10 / 60)
    assert north[("KIT-A", "DC-N2")] == pytest.approx(30 / 60)
    assert north[("KIT-B", "DC-N1")] == pytest.approx(20 / 60)
    # all × all: the six pairs sum to 120 a month; PUMP-Y is imputed (below).
    assert mix["month_of_year"].isna().all()  # only one year of history: no seasonal mix
    assert set(mix["level"]) == {level_name(*lv) for lv in MIX_LEVELS}
    sums = mix.groupby(["level", "group_item", "group_location"])["share"].sum()
    np.testing.assert_allclose(sums, 1.0)
    basis = mix.loc[(mix["level"] == "family×region") & (mix["group_item"] == "GARDEN-KITS")
                    & (mix["group_location"] == "NORTH"), "basis"].iloc[0]
    assert basis == "family GARDEN-KITS × region NORTH mix, 12 months to 2026-11"


def test_item_without_history_gets_family_average_and_a_warning():
    mix = historical_mix(flat_actuals(), items=ITEMS, locations=LOCATIONS, cycle="2026-11")
    # PUMP-Y has no actuals; PUMPS sold at DC-N1 (PUMP-X 5) and DC-S1 (15), so PUMP-Y is placed at those
    # locations with the family's average per item there: 5 and 15.  PUMPS × all locations then holds
    # 5 + 15 + 5 + 15 = 40, PUMP-Y's share 20/40.
    pumps = shares_at(mix, "family×all", "PUMPS", "all")
    assert pumps[("PUMP-Y", "DC-N1")] == pytest.approx(5 / 40)
    assert pumps[("PUMP-Y", "DC-S1")] == pytest.approx(15 / 40)
    assert ("PUMP-Y", "DC-N2") not in pumps.index
    imputed = mix[mix["imputed"]]
    assert set(imputed["item"]) == {"PUMP-Y"}
    assert imputed["basis"].str.contains("family's average").all()
    assert any(w.startswith("item PUMP-Y:") for w in mix.attrs["warnings"])


def seasonal_actuals(repeat=True, seed=0):
    """Two years to 2026-11 where KIT-A sells five times its usual in June (both years if ``repeat``)."""
    rng = np.random.default_rng(seed)
    rows = []
    for period in month_range("2024-12", "2026-11"):
        for item, location, base in (("KIT-A", "DC-N1", 50.0), ("KIT-B", "DC-N1", 50.0), ("KIT-C", "DC-N1", 50.0)):
            june = period.endswith("-06") and (repeat or period.startswith("2025"))
            rows.append((item, location, period, base * (5 if item == "KIT-A" and june else 1) + rng.normal(0, 1)))
    return pd.DataFrame(rows, columns=["item", "location", "period", "quantity"])


def test_repeating_month_mix_is_seasonal_and_pooled_over_two_years():
    acts = seasonal_actuals(repeat=True)
    mix = historical_mix(acts, items=ITEMS.iloc[:3], locations=LOCATIONS, cycle="2026-11")
    group = mix[(mix["level"] == "family×location") & (mix["group_location"] == "DC-N1")]
    assert group["month_of_year"].notna().all() and len(group) == 36
    june = group[group["month_of_year"] == 6].set_index("item")["share"]
    # Oracle: pooled June quantities over the two years, divided by the June group total (hand formula).
    juns = acts[acts["period"].str.endswith("-06")].groupby("item")["quantity"].sum()
    np.testing.assert_allclose(june.sort_index(), (juns / juns.sum()).sort_index(), rtol=1e-12)
    assert june["KIT-A"] > 0.6
    np.testing.assert_allclose(group.groupby("month_of_year")["share"].sum(), 1.0)
    assert group["basis"].str.contains("month-of-year mix, 24 months to 2026-11").all()


def test_one_off_month_shift_is_not_seasonal():
    # June peak in 2025 only: the month does not repeat, so the year-to-year move of June's mix is as
    # large as its shift from the year's mix, the variance ratio stays below 4 and the group stays flat
    # (our documented rule).
    mix = historical_mix(seasonal_actuals(repeat=False), items=ITEMS.iloc[:3], locations=LOCATIONS, cycle="2026-11")
    assert mix["month_of_year"].isna().all()


def test_noise_without_season_stays_flat():
    # Large independent month-to-month noise (sd 30% of level) and no pattern: the month-of-year shares
    # scatter, but no more than year-to-year noise explains (variance ratio near 1, our rule asks 4).
    rng = np.random.default_rng(11)
    periods = month_range("2024-12", "2026-11")
    rows = [(item, "DC-N1", p, max(0.0, 50 + rng.normal(0, 15))) for item in ("KIT-A", "KIT-B", "KIT-C")
            for p in periods]
    acts = pd.DataFrame(rows, columns=["item", "location", "period", "quantity"])
    mix = historical_mix(acts, items=ITEMS.iloc[:3], locations=LOCATIONS, cycle="2026-11")
    assert mix["month_of_year"].isna().all()


def test_seasonal_off_gives_flat_mix():
    mix = historical_mix(seasonal_actuals(), items=ITEMS.iloc[:3], locations=LOCATIONS, cycle="2026-11",
                         seasonal=False)
    assert mix["month_of_year"].isna().all()


def test_mix_options_are_checked():
    with pytest.raises(InvalidSpec):
        historical_mix(flat_actuals(), items=ITEMS, locations=LOCATIONS, cycle="2026-11", window_months=0)
    unknown = flat_actuals().assign(item="NOT-AN-ITEM")
    with pytest.raises(ValueError):
        historical_mix(unknown, items=ITEMS, locations=LOCATIONS, cycle="2026-11")


def test_window_ends_at_cycle():
    acts = flat_actuals(cycle="2026-12", months=13)
    late = acts["period"] == "2026-12"
    acts.loc[late & (acts["item"] == "KIT-A"), "quantity"] = 1e6  # after the cycle: must not count
    mix = historical_mix(acts, items=ITEMS, locations=LOCATIONS, cycle="2026-11")
    assert shares_at(mix, "family×region", "GARDEN-KITS", "NORTH")[("KIT-A", "DC-N1")] == pytest.approx(10 / 60)


# --- split to grain -------------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def mix():
    return historical_mix(flat_actuals(), items=ITEMS, locations=LOCATIONS, cycle="2026-11")


def test_split_family_region_row(mix):
    rows = pd.DataFrame({"row_id": [7], "family": ["GARDEN-KITS"], "item": [None], "region": ["NORTH"],
                         "location": [None], "period": ["2027-01"], "quantity": [600.0]})
    out, warnings = split_to_grain(rows, mix=mix, items=ITEMS, locations=LOCATIONS)
    assert list(out.columns[:7]) == ["row_id", "item", "location", "period", "quantity", "share", "share_basis"]
    got = out.set_index(["item", "location"])["quantity"]
    assert got[("KIT-A", "DC-N1")] == pytest.approx(100.0)
    assert got[("KIT-A", "DC-N2")] == pytest.approx(300.0)
    assert got[("KIT-B", "DC-N1")] == pytest.approx(200.0)
    assert (out["share_basis"] == "family GARDEN-KITS × region NORTH mix, 12 months to 2026-11").all()
    assert warnings == []


def test_split_item_location_row_is_given(mix):
    rows = pd.DataFrame({"row_id": [1], "item": ["KIT-C"], "location": ["DC-S1"], "period": ["2027-03"],
                         "quantity": [12.0], "week_share": [0.5]})
    out, _ = split_to_grain(rows, mix=mix, items=ITEMS, locations=LOCATIONS)
    assert out[["item", "location", "quantity", "share"]].values.tolist() == [["KIT-C", "DC-S1", 12.0, 1.0]]
    assert out["share_basis"].iloc[0] == "given at item × location"
    assert out["week_share"].iloc[0] == 0.5  # extra columns ride along


def test_split_warns_about_imputed_items(mix):
    rows = pd.DataFrame({"row_id": [3], "family": ["PUMPS"], "period": ["2027-01"], "quantity": [40.0]})
    out, warnings = split_to_grain(rows, mix=mix, items=ITEMS, locations=LOCATIONS)
    assert out["quantity"].sum() == pytest.approx(40.0)
    assert any("PUMP-Y" in w for w in warnings)


def test_group_absent_from_mix_is_split_equally_with_a_warning(mix):
    # KIT-B never sold in SOUTH: item × region (KIT-B, SOUTH) has no mix; SOUTH has one location.
    rows = pd.DataFrame({"row_id": [9, 10], "item": ["KIT-B", "KIT-B"], "region": ["SOUTH", "NORTH"],
                         "period": ["2027-01", "2027-01"], "quantity": [8.0, 6.0]})
    out, warnings = split_to_grain(rows, mix=mix, items=ITEMS, locations=LOCATIONS)
    south = out[out["row_id"] == 9]
    assert south[["item", "location", "quantity"]].values.tolist() == [["KIT-B", "DC-S1", 8.0]]
    assert south["share_basis"].str.contains("split equally").all()
    assert any("item KIT-B × region SOUTH" in w for w in warnings)


def test_split_refuses_unknown_names(mix):
    rows = pd.DataFrame({"row_id": [1], "family": ["NO-SUCH-FAMILY"], "period": ["2027-01"], "quantity": [1.0]})
    with pytest.raises(ValueError):
        split_to_grain(rows, mix=mix, items=ITEMS, locations=LOCATIONS)


row_strategy = st.tuples(
    st.sampled_from(["KIT-A", "KIT-C", "PUMP-Y", None]), st.sampled_from(["GARDEN-KITS", "PUMPS", None]),
    st.sampled_from(["DC-N1", "DC-S1", None]), st.sampled_from(["NORTH", "SOUTH", None]),
    st.sampled_from(["2027-01", "2027-06", "2027-12"]), st.floats(0, 1e7))


@functools.cache
def cached_mix(seasonal: bool) -> pd.DataFrame:
    return historical_mix(seasonal_actuals() if seasonal else flat_actuals(), items=ITEMS, locations=LOCATIONS,
                          cycle="2026-11")


@pytest.mark.slow
@settings(max_examples=30, deadline=None)
@given(data=st.lists(row_strategy, min_size=1, max_size=30), seasonal=st.booleans())
def test_splitting_then_summing_returns_the_original(data, seasonal):
    mix = cached_mix(seasonal)
    rows = pd.DataFrame(data, columns=["item", "family", "location", "region", "period", "quantity"])
    rows["row_id"] = np.arange(len(rows)) * 10
    out, _ = split_to_grain(rows, mix=mix, items=ITEMS, locations=LOCATIONS)
    totals = out.groupby("row_id")["quantity"].sum().reindex(rows["row_id"])
    np.testing.assert_allclose(totals.to_numpy(), rows["quantity"].to_numpy(), rtol=1e-9, atol=1e-6)
    assert out["item"].isin(ITEMS["item"]).all() and out["location"].isin(LOCATIONS["location"]).all()
    assert (out["share"] >= 0).all()


# --- value to units -------------------------------------------------------------------------------------

def test_value_of_item_row_uses_its_price(mix):
    rows = pd.DataFrame({"row_id": [1], "item": ["KIT-B"], "period": ["2027-01"], "value": [500.0]})
    out = value_to_units(rows, items=ITEMS, mix=mix)
    assert out["quantity"].iloc[0] == pytest.approx(25.0)
    assert out["unit_price"].iloc[0] == pytest.approx(20.0)


def test_value_of_family_row_uses_mix_weighted_price(mix):
    # GARDEN-KITS × NORTH shares 1/6, 1/2 (KIT-A) and 1/3 (KIT-B): p̄ = (1/6+1/2)·10 + (1/3)·20 = 13.33…
    rows = pd.DataFrame({"row_id": [1], "family": ["GARDEN-KITS"], "region": ["NORTH"], "period": ["2027-01"],
                         "value": [800.0]})
    out = value_to_units(rows, items=ITEMS, mix=mix)
    assert out["unit_price"].iloc[0] == pytest.approx(40 / 3)
    assert out["quantity"].iloc[0] == pytest.approx(60.0)


@pytest.mark.slow
@settings(max_examples=20, deadline=None)
@given(data=st.lists(row_strategy, min_size=1, max_size=15))
def test_units_split_and_priced_return_the_value(data):
    # Invariant: Σ_pairs split quantity × item price = the submitted value (exactness of p̄ = Σ s·p).
    mix = cached_mix(True)
    rows = pd.DataFrame(data, columns=["item", "family", "location", "region", "period", "value"])
    rows["row_id"] = np.arange(len(rows))
    units = value_to_units(rows, items=ITEMS, mix=mix)
    out, _ = split_to_grain(units.drop(columns="value"), mix=mix, items=ITEMS, locations=LOCATIONS)
    priced = out["quantity"] * out["item"].map(ITEMS.set_index("item")["unit_price"])
    np.testing.assert_allclose(priced.groupby(out["row_id"]).sum().reindex(rows["row_id"]).to_numpy(),
                               rows["value"].to_numpy(), rtol=1e-9, atol=1e-6)


def test_missing_price_is_refused(mix):
    items = ITEMS.assign(unit_price=[10.0, 0.0, 40.0, 100.0, 300.0])
    rows = pd.DataFrame({"row_id": [1], "item": ["KIT-B"], "period": ["2027-01"], "value": [5.0]})
    with pytest.raises(ValueError, match="unit price"):
        value_to_units(rows, items=items, mix=mix)
