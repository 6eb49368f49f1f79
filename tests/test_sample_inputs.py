"""The committed demo files are what the generator makes, and the scenario keeps its promises."""

from __future__ import annotations

import datetime as dt
import functools
import importlib.util
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from statsmodels.tsa.seasonal import STL

from consensus import periods

SAMPLE = Path(__file__).resolve().parent.parent / "sample_inputs"
GENERATOR = SAMPLE / "generate.py"
NOT_GENERATED = {"generate.py", "README.md"}
CURRENT_CYCLE = "2026-11"
HORIZON_MONTHS = periods.horizon_months(CURRENT_CYCLE, 18)


@functools.cache
def load_generator():
    spec = importlib.util.spec_from_file_location("sample_generate", GENERATOR)
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module  # dataclasses look their module up by name
    spec.loader.exec_module(module)
    return module


def committed_files() -> set[str]:
    return {p.relative_to(SAMPLE).as_posix() for p in SAMPLE.rglob("*")
            if p.is_file() and p.name not in NOT_GENERATED and "__pycache__" not in p.parts}


@pytest.fixture(scope="module")
def regenerated(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("regenerated")
    subprocess.run([sys.executable, str(GENERATOR), str(out)], check=True, capture_output=True)
    return out


@pytest.fixture(scope="module")
def items() -> pd.DataFrame:
    return pd.read_csv(SAMPLE / "master/items.csv", dtype={"unit_price": float})


@pytest.fixture(scope="module")
def locations() -> pd.DataFrame:
    return pd.read_csv(SAMPLE / "master/locations.csv")


@pytest.fixture(scope="module")
def orders() -> pd.DataFrame:
    return pd.read_csv(SAMPLE / "history/orders.csv")


@pytest.fixture(scope="module")
def monthly(orders, items, locations) -> pd.DataFrame:
    """Every item × location × history month, zeros included, with family and region."""
    sums = (orders.assign(period=orders["date"].str.slice(0, 7))
            .groupby(["item", "location", "period"], as_index=False)["quantity"].sum())
    grid = pd.MultiIndex.from_product(
        [items["item"], locations["location"], periods.month_range("2023-12", "2026-11")],
        names=["item", "location", "period"]).to_frame(index=False)
    full = grid.merge(sums, how="left").fillna({"quantity": 0})
    return full.merge(items[["item", "family"]]).merge(locations[["location", "region"]])


def family_region(monthly: pd.DataFrame) -> pd.DataFrame:
    return monthly.groupby(["family", "region", "period"], as_index=False)["quantity"].sum()


def window_sum(frame: pd.DataFrame, first: str, last: str) -> float:
    return float(frame.loc[frame["period"].between(first, last), "quantity"].sum())


# ----------------------------------------------------------------------------- determinism

def _workbook_cells(path) -> dict:
    """Every sheet's cell values and visibility: what a spreadsheet holds, whatever XML writer saved it."""
    from openpyxl import load_workbook

    book = load_workbook(path)
    return {ws.title: (ws.sheet_state, [tuple(row) for row in ws.iter_rows(values_only=True)]) for ws in book}


@pytest.mark.slow
def test_generator_reproduces_committed_files(regenerated):
    # Text files must match byte for byte.  Workbooks are compared by content: openpyxl writes the same cells
    # with slightly different XML spacing depending on whether lxml is installed.
    made = {p.relative_to(regenerated).as_posix() for p in regenerated.rglob("*") if p.is_file()}
    assert made == committed_files()
    differing = [name for name in sorted(made)
                 if (name.endswith(".xlsx") and _workbook_cells(regenerated / name) != _workbook_cells(SAMPLE / name))
                 or (not name.endswith(".xlsx") and (regenerated / name).read_bytes() != (SAMPLE / name).read_bytes())]
    assert differing == []


def test_spreadsheets_carry_no_clock_time(regenerated):
    # openpyxl stamps the save time into each zip entry and into docProps/core.xml; the generator pins both.
    import zipfile
    for name in ("current/sales_north.xlsx", "current/marketing_events.xlsx"):
        with zipfile.ZipFile(regenerated / name) as book:
            assert {info.date_time for info in book.infolist()} == {(2026, 11, 27, 9, 0, 0)}
            assert b"2026-11-27T09:00:00Z" in book.read("docProps/core.xml")


# ----------------------------------------------------------------------------- master data

def test_item_master_has_families_prices_and_unique_items(items):
    assert list(items.columns) == ["item", "description", "family", "unit_price"]
    assert items["item"].is_unique
    assert len(items) >= 40
    assert items["family"].nunique() >= 3
    assert (items["unit_price"] > 0).all()
    # Common practice: kits and controllers cost tens to a couple of hundred, packs of parts a few units.
    by_family = items.groupby("family")["unit_price"].median()
    assert by_family["SPARES"] < by_family["SPRINKLERS"] < by_family["DRIP-KITS"]


def test_locations_are_four_dcs_in_two_regions(locations):
    assert list(locations.columns) == ["location", "region", "description"]
    assert len(locations) == 4 and locations["location"].is_unique
    assert locations.groupby("region").size().to_dict() == {"NORTH": 2, "SOUTH": 2}


def test_bom_has_two_levels_and_components_outside_the_item_master(items):
    bom = pd.read_csv(SAMPLE / "master/bom.csv")
    assert list(bom.columns) == ["parent", "component", "qty_per", "lead_time_months"]
    assert not bom.duplicated(["parent", "component"]).any()
    assert (bom["qty_per"] > 0).all() and (bom["lead_time_months"] >= 0).all()
    sellable = set(items["item"])
    kits = set(items.loc[items["family"] == "DRIP-KITS", "item"])
    assert set(bom["parent"]) - set(bom["component"]) == kits  # top-level parents are exactly the kits
    assert not sellable & set(bom["component"])
    sub_assemblies = set(bom["parent"]) & set(bom["component"])
    assert sub_assemblies and not sub_assemblies & sellable
    # Two levels: every kit reaches a bought part through at least one sub-assembly.
    assert set(bom.loc[bom["parent"].isin(kits), "component"]) & sub_assemblies
    second = bom[bom["parent"].isin(sub_assemblies)]
    assert not set(second["component"]) & set(bom["parent"])  # no third level, hence no cycle
    # One lead time per component wherever it is used.
    assert (bom.groupby("component")["lead_time_months"].nunique() == 1).all()


# ----------------------------------------------------------------------------- order history

def test_orders_cover_36_months_with_known_keys(orders, items, locations):
    assert list(orders.columns) == ["date", "item", "location", "quantity"]
    dates = pd.to_datetime(orders["date"], format="%Y-%m-%d")
    assert dates.min() >= pd.Timestamp("2023-12-01") and dates.max() <= pd.Timestamp("2026-11-30")
    assert orders["date"].str.slice(0, 7).nunique() == 36
    assert set(orders["item"]) <= set(items["item"]) and set(orders["location"]) == set(locations["location"])
    assert pd.api.types.is_integer_dtype(orders["quantity"]) and (orders["quantity"] > 0).all()
    assert (SAMPLE / "history/orders.csv").stat().st_size < 8_000_000
    assert (dates.dt.day_of_week < 5).all()  # business days only


def test_orders_come_in_several_lines_a_month(orders, items):
    regular = items.loc[items["family"] != "SPARES", "item"]
    lines = (orders[orders["item"].isin(regular)].assign(period=orders["date"].str.slice(0, 7))
             .groupby(["item", "location", "period"]).size())
    assert lines.median() >= 3


def test_intermittent_and_lumpy_items_are_present(monthly):
    # Syntetos, Boylan & Croston (2005), J. Oper. Res. Soc. 56:495–503: ADI (mean interval between
    # demands) > 1.32 marks intermittent demand; with squared CV of the non-zero sizes > 0.49 it is lumpy.
    sold = monthly[monthly.groupby("item")["quantity"].transform("sum") > 0]
    per_cell = sold.groupby(["item", "location"])["quantity"]
    adi = per_cell.size() / per_cell.apply(lambda q: max((q > 0).sum(), 1))
    intermittent_everywhere = (adi > 1.32).groupby(level="item").all()
    never_intermittent = (adi <= 1.32).groupby(level="item").all()
    nonzero = sold[sold["quantity"] > 0].groupby("item")["quantity"]
    cv2 = nonzero.var(ddof=0) / nonzero.mean() ** 2
    lumpy = intermittent_everywhere & (cv2 > 0.49)
    assert intermittent_everywhere.sum() >= 3
    assert lumpy.sum() >= 3
    assert never_intermittent.sum() >= 30  # most items sell nearly every month at every DC


def test_launch_item_has_no_history_yet(monthly):
    assert monthly.loc[monthly["item"] == "TM-HUB-4", "quantity"].sum() == 0


@pytest.mark.parametrize("family", ["DRIP-KITS", "SPRINKLERS", "TIMERS", "SPARES"])
def test_yearly_seasonality_is_detectable(monthly, family):
    series = monthly[monthly["family"] == family].groupby("period")["quantity"].sum()
    fit = STL(series.to_numpy(), period=12, robust=True).fit()
    # Seasonal strength F_S = max(0, 1 − Var(R)/Var(S+R)) (Wang, Smith & Hyndman 2006; Hyndman &
    # Athanasopoulos, Forecasting: Principles and Practice 3e, §4.3); above 0.6 is clearly seasonal.
    strength = max(0.0, 1 - np.var(fit.resid) / np.var(fit.seasonal + fit.resid))
    assert strength > 0.6
    calendar = series.groupby(series.index.str.slice(5, 7)).mean()
    if family != "SPARES":  # spares are mildly seasonal only
        assert calendar.max() > 2.5 * calendar.min()
    assert calendar.idxmax() in {"04", "05", "06", "07"}  # a spring/summer peak


def test_trend_grows_drip_kits_and_turns_sprinklers(monthly):
    drip = monthly[monthly["family"] == "DRIP-KITS"]
    assert window_sum(drip, "2025-12", "2026-11") > 1.15 * window_sum(drip, "2023-12", "2024-11")
    # Sprinklers: year-on-year up before the 2025 turn, down after it (north: no deal there to blur it).
    north = monthly[(monthly["family"] == "SPRINKLERS") & (monthly["region"] == "NORTH")]
    by_month = north.groupby("period")["quantity"].sum()
    yoy = by_month / by_month.shift(12)
    assert yoy["2024-12":"2025-02"].median() > 1.02
    assert yoy["2026-03":"2026-11"].median() < 0.95


# ----------------------------------------------------------------------------- past cycles

PAST_CYCLES = periods.month_range("2025-11", "2026-10")


def test_past_files_hold_twelve_cycles_planning_their_own_horizons(items, locations):
    sales = pd.read_csv(SAMPLE / "past/sales_history.csv")
    dc = pd.read_csv(SAMPLE / "past/dc_history.csv")
    assert list(sales.columns) == ["cycle", "family", "region", "period", "quantity"]
    assert list(dc.columns) == ["cycle", "item", "location", "period", "quantity"]
    for frame in (sales, dc):
        assert sorted(frame["cycle"].unique()) == PAST_CYCLES
        lag = periods.lags(frame["cycle"], frame["period"])
        assert lag.min() == 1 and lag.max() == 18
        assert (frame["quantity"] >= 0).all()
    assert not sales.duplicated(["cycle", "family", "region", "period"]).any()
    assert not dc.duplicated(["cycle", "item", "location", "period"]).any()
    assert set(sales["family"]) <= set(items["family"]) and set(sales["region"]) == {"NORTH", "SOUTH"}
    assert set(dc["item"]) <= set(items["item"]) and set(dc["location"]) == set(locations["location"])
    short = periods.lags(dc["cycle"], dc["period"])[dc["location"].to_numpy() == "DC-S2"]
    assert short.max() == 6  # the weekly-planning DC looks ~26 weeks ahead only


def test_sales_are_optimistic_and_slow_to_see_the_sprinkler_turn(monthly):
    sales = pd.read_csv(SAMPLE / "past/sales_history.csv")
    matched = sales.merge(family_region(monthly).rename(columns={"quantity": "actual"}),
                          on=["family", "region", "period"])
    bias = matched.groupby(["family", "region"])[["quantity", "actual"]].sum()
    bias = bias["quantity"] / bias["actual"] - 1
    overall = matched["quantity"].sum() / matched["actual"].sum() - 1
    assert 0.08 <= overall <= 0.20
    assert (bias > 0).all()
    # Slow to see the turn: the sprinklers carry the largest bias, shrinking from the first cycles to the last.
    assert bias.groupby(level="family").mean().idxmax() == "SPRINKLERS"
    sprinklers = matched[matched["family"] == "SPRINKLERS"]
    by_cycle = sprinklers.groupby("cycle")[["quantity", "actual"]].sum()
    by_cycle = by_cycle["quantity"] / by_cycle["actual"] - 1
    assert by_cycle.iloc[:3].mean() > by_cycle.iloc[-3:].mean() + 0.05


def test_dc_plans_are_unbiased_and_near_each_location_s_orders(monthly):
    dc = pd.read_csv(SAMPLE / "past/dc_history.csv")
    matched = dc.merge(monthly[["item", "location", "period", "quantity"]].rename(columns={"quantity": "actual"}),
                       on=["item", "location", "period"])
    assert len(matched) > 0.8 * (dc["period"] <= "2026-11").sum()
    assert abs(matched["quantity"].sum() / matched["actual"].sum() - 1) < 0.05
    per_location = matched.groupby("location")[["quantity", "actual"]].sum()
    assert ((per_location["quantity"] / per_location["actual"] - 1).abs() < 0.08).all()
    # Noisy at item level: weighted absolute percentage error well above the aggregate error.
    wape = (matched["quantity"] - matched["actual"]).abs().sum() / matched["actual"].sum()
    assert wape > 0.15


def _measured_uplift(monthly: pd.DataFrame, row: pd.Series) -> float:
    """Difference-in-differences uplift of an event: its window against the same months a year earlier,
    relative to a control (the rest of the family when the event covers part of it, otherwise the two
    months before the window)."""
    family = row["family"] if pd.notna(row["family"]) else monthly.loc[monthly["item"] == row["item"], "family"].iloc[0]
    fam = monthly[monthly["family"] == family]
    in_scope = (fam["item"] == row["item"]) if pd.notna(row["item"]) else pd.Series(True, index=fam.index)
    if pd.notna(row["region"]):
        in_scope &= fam["region"] == row["region"]
    start, end = row["start"], row["end"]
    a_year = lambda m: periods.shift_month(m, -12)  # noqa: E731

    def yoy(frame, first, last):
        return window_sum(frame, first, last) / window_sum(frame, a_year(first), a_year(last))

    treated = yoy(fam[in_scope], start, end)
    if in_scope.all():
        control = yoy(fam, periods.shift_month(start, -2), periods.shift_month(start, -1))
    else:
        control = yoy(fam[~in_scope], start, end)
    return treated / control - 1


def test_marketing_events_mostly_materialise_in_the_orders(monthly, items):
    events = pd.read_csv(SAMPLE / "past/marketing_events_history.csv")
    assert list(events.columns) == ["cycle", "event", "item", "family", "region", "start", "end", "uplift_pct", "note"]
    assert (events["item"].notna() ^ events["family"].notna()).all()
    assert set(events["item"].dropna()) <= set(items["item"])
    assert set(events["family"].dropna()) <= set(items["family"])
    first = periods.month_indexes(events["cycle"]) + 1
    assert (periods.month_indexes(events["end"]) >= first).all()
    assert (periods.month_indexes(events["start"]) <= first + 17).all()
    # Marketing is absent where it has no event: it never plans a cycle without naming an event.
    latest = events.sort_values("cycle").groupby("event").last().reset_index()
    past = latest[latest["end"] <= "2026-11"]
    assert len(past) >= 4
    measured = past.apply(lambda r: _measured_uplift(monthly, r), axis=1)
    materialised = measured >= 0.5 * past["uplift_pct"] / 100
    assert materialised.mean() >= 0.6
    assert not materialised.all()  # one announced event fizzled, as events sometimes do


# ----------------------------------------------------------------------------- current cycle

def test_sales_north_workbook_is_units_for_the_north(items, monthly):
    north = pd.read_excel(SAMPLE / "current/sales_north.xlsx", sheet_name="forecast")
    assert list(north.columns) == ["family", "region", "period", "quantity", "note"]
    assert set(north["region"]) == {"NORTH"}
    assert set(north["family"]) == set(items["family"])
    assert sorted(north["period"].unique()) == HORIZON_MONTHS
    assert north["note"].notna().sum() >= 2
    actual = family_region(monthly).query("region == 'NORTH'")
    first_year = north[north["period"] <= "2027-11"].groupby("family")["quantity"].sum()
    last_year = actual[actual["period"] >= "2025-12"].groupby("family")["quantity"].sum()
    assert ((first_year / last_year).between(0.95, 1.45)).all()  # optimistic, but of the right size


def test_sales_south_is_money_in_cp1252_that_converts_to_sensible_units(items, monthly):
    raw = (SAMPLE / "current/sales_south.csv").read_bytes()
    with pytest.raises(UnicodeDecodeError):
        raw.decode("utf-8")  # the encoding matters: é and – are single cp1252 bytes
    south = pd.read_csv(SAMPLE / "current/sales_south.csv", sep=";", encoding="cp1252")
    assert list(south.columns) == ["family", "region", "period", "value", "note"]
    assert south["note"].str.contains("é|–", regex=True).any()
    assert set(south["region"]) == {"SOUTH"} and sorted(south["period"].unique()) == HORIZON_MONTHS
    # Value → units with the family's units-weighted mean list price over the last 12 months.
    recent = monthly[(monthly["region"] == "SOUTH") & (monthly["period"] >= "2025-12")]
    recent = recent.merge(items[["item", "unit_price"]])
    price = (recent["quantity"] * recent["unit_price"]).groupby(recent["family"]).sum() \
        / recent.groupby("family")["quantity"].sum()
    units = (south.set_index("family")["value"] / price).groupby(level=0).apply(
        lambda s: s.iloc[:12].sum())
    last_year = recent.groupby("family")["quantity"].sum()
    assert ((units / last_year).between(0.95, 1.45)).all()


@pytest.mark.parametrize("code", ["n1", "n2", "s1"])
def test_monthly_dc_files_plan_their_own_location_near_its_orders(code, items, monthly):
    dc = pd.read_csv(SAMPLE / f"current/dc_{code}.csv")
    location = f"DC-{code.upper()}"
    assert list(dc.columns) == ["item", "location", "period", "quantity"]
    assert set(dc["location"]) == {location}
    assert set(dc["item"]) == set(items["item"])
    assert sorted(dc["period"].unique()) == HORIZON_MONTHS
    assert not dc.duplicated(["item", "period"]).any() and (dc["quantity"] >= 0).all()
    planned = dc[dc["period"] <= "2027-11"]["quantity"].sum()
    ordered = monthly[(monthly["location"] == location) & (monthly["period"] >= "2025-12")]["quantity"].sum()
    assert 0.8 < planned / ordered < 1.3
    launch = dc[dc["item"] == "TM-HUB-4"].set_index("period")["quantity"]
    assert launch[:"2027-02"].sum() == 0 and launch["2027-03":].sum() > 0


def test_weekly_dc_file_covers_26_iso_weeks_inside_the_horizon(items, monthly):
    weekly = pd.read_csv(SAMPLE / "current/dc_s2_weekly.csv")
    assert list(weekly.columns) == ["item", "location", "week", "quantity"]
    assert set(weekly["location"]) == {"DC-S2"} and set(weekly["item"]) == set(items["item"])
    weeks = sorted(weekly["week"].unique())
    assert len(weeks) == 26 and all(len(w) == 8 and w[4:6] == "-W" for w in weeks)
    # ISO 8601: a week belongs to the month of its Thursday; every week's Thursday is in the horizon.
    thursdays = [dt.date.fromisocalendar(int(w[:4]), int(w[6:]), 4) for w in weeks]
    assert all(t.strftime("%Y-%m") in HORIZON_MONTHS for t in thursdays)
    assert all((b - a).days == 7 for a, b in zip(thursdays, thursdays[1:]))
    # Half a year of the DC's plan against the same half-year of its orders a year earlier.
    ordered = monthly[(monthly["location"] == "DC-S2") & monthly["period"].between("2025-12", "2026-05")]
    assert 0.8 < weekly["quantity"].sum() / ordered["quantity"].sum() < 1.3


def test_current_marketing_events_hold_a_promotion_a_launch_and_a_price_move(items):
    events = pd.read_excel(SAMPLE / "current/marketing_events.xlsx", sheet_name="events")
    assert list(events.columns) == ["event", "family", "item", "region", "start", "end", "uplift_pct", "units", "note"]
    assert (events["item"].notna() ^ events["family"].notna()).all()
    assert (events["uplift_pct"].notna() ^ events["units"].notna()).all()
    assert set(events["item"].dropna()) <= set(items["item"])
    assert set(events["family"].dropna()) <= set(items["family"])
    assert events["start"].isin(HORIZON_MONTHS).all() and events["end"].isin(HORIZON_MONTHS).all()
    assert (events["start"] <= events["end"]).all()
    spring = events[(events["uplift_pct"] > 0) & events["start"].str.slice(5, 7).isin(["03", "04", "05"])]
    launch = events[events["units"].notna()]
    price_move = events[events["uplift_pct"] < 0]
    assert len(spring) >= 1 and len(launch) == 1 and len(price_move) == 1
    assert launch["item"].iloc[0] == "TM-HUB-4"


def test_broken_sales_file_has_each_deliberate_mistake(items):
    broken = pd.read_csv(SAMPLE / "broken/sales_typo.csv", dtype={"period": str})
    assert not set(broken["family"]) <= set(items["family"])
    assert not broken["period"].map(periods.is_month).all()
    assert (broken["quantity"] < 0).any()
    assert broken.duplicated(["family", "region", "period"]).any()


def test_manifest_lists_every_file_in_load_order():
    manifest = json.loads((SAMPLE / "manifest.json").read_text(encoding="utf-8"))
    assert manifest["current_cycle"] == CURRENT_CYCLE and manifest["horizon"] == 18
    assert manifest["past_cycles"] == PAST_CYCLES
    files = manifest["files"]
    assert {f["path"] for f in files} | {"manifest.json"} == committed_files()
    assert {f["kind"] for f in files} <= {"items", "locations", "bom", "actuals", "forecast", "events"}
    assert {f["source"] for f in files} <= {"sales", "dc", "marketing", None}
    assert all(f["cycle"] in (None, CURRENT_CYCLE) and f["submitted_by"] for f in files)
    kinds = [f["kind"] for f in files]
    assert kinds[:4] == ["items", "locations", "bom", "actuals"]  # master data before anything refers to it
    assert [f["path"] for f in files if f.get("expect") == "rejected"] == ["broken/sales_typo.csv"]


# ----------------------------------------------------------------------------- generator pieces

@settings(max_examples=30, deadline=None)
@given(st.lists(st.floats(0, 500, allow_nan=False), min_size=6, max_size=6))
def test_weekly_split_keeps_the_half_year_total(monthly_units):
    generate = load_generator()
    months = periods.horizon_months(CURRENT_CYCLE, 6)
    plan = pd.DataFrame({"item": "X", "location": "DC-S2", "period": months, "units_exact": monthly_units})
    weeks = generate.horizon_weeks(CURRENT_CYCLE, 26)
    weekly = generate.weekly_from_monthly(plan, weeks)
    exact = sum(u / pd.Period(m).days_in_month * sum(
        1 for _, days in weeks for d in days if max(d.strftime("%Y-%m"), months[0]) == m)
        for u, m in zip(monthly_units, months))
    # Cumulative rounding: the rounded weeks sum to within half a unit of the exact total, and none is
    # negative. (Not "== round(exact)": a total that lands on .5 rounds either way, depending on the order the
    # floats were added in; hypothesis found such a case.)
    assert abs(weekly["quantity"].sum() - exact) <= 0.5 + 1e-9
    assert (weekly["quantity"] >= 0).all()
