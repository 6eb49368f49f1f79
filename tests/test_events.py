"""Marketing events applied as uplifts on the statistical forecast."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from consensus.errors import InvalidSpec
from consensus.methods.accuracy import forecast_errors
from consensus.methods.events import apply_event_uplifts, uplift_value_added

ITEMS = pd.DataFrame({"item": ["A", "B", "C"], "family": ["F1", "F1", "F2"], "unit_price": [1.0, 1.0, 1.0]})
LOCATIONS = pd.DataFrame({"location": ["L1", "L2"], "region": ["North", "South"]})


def stat_frame() -> pd.DataFrame:
    rows = []
    for lag, period in enumerate(["2026-02", "2026-03", "2026-04"], start=1):
        for item, loc, qty in (("A", "L1", 100.0), ("B", "L1", 300.0), ("A", "L2", 0.0), ("C", "L2", 50.0)):
            rows.append((item, loc, period, lag, qty))
    return pd.DataFrame(rows, columns=["item", "location", "period", "lag", "quantity"])


def events_frame(rows) -> pd.DataFrame:
    columns = ["event", "item", "family", "location", "region", "start", "end", "uplift_pct", "units", "note"]
    return pd.DataFrame(rows, columns=columns)


def quantity(frame, item, loc, period):
    return frame[(frame["item"] == item) & (frame["location"] == loc) & (frame["period"] == period)]["quantity"].iloc[0]


def test_percentage_uplift_on_an_item_in_its_months_only():
    events = events_frame([("spring", "A", None, "L1", None, "2026-03", "2026-04", 20.0, None, "spring promo")])
    adjusted, audit = apply_event_uplifts(stat_frame(), events, items=ITEMS, locations=LOCATIONS)
    assert quantity(adjusted, "A", "L1", "2026-02") == 100.0
    assert quantity(adjusted, "A", "L1", "2026-03") == pytest.approx(120.0)
    assert quantity(adjusted, "A", "L2", "2026-03") == 0.0
    assert len(audit) == 2 and (audit["uplift_units"] == 20.0).all()
    assert audit["note"].str.startswith("spring promo").all()
    assert list(audit.columns) == ["event", "item", "location", "period", "base", "uplift_units", "note"]


def test_units_on_a_family_split_by_the_statistical_mix():
    events = events_frame([("launch", None, "F1", None, "North", "2026-02", "2026-02", None, 80.0, "")])
    adjusted, audit = apply_event_uplifts(stat_frame(), events, items=ITEMS, locations=LOCATIONS)
    # F1 in North (L1): A 100, B 300 -> shares 0.25 / 0.75 of 80 units.
    assert quantity(adjusted, "A", "L1", "2026-02") == pytest.approx(120.0)
    assert quantity(adjusted, "B", "L1", "2026-02") == pytest.approx(360.0)
    assert audit["uplift_units"].sum() == pytest.approx(80.0)
    assert quantity(adjusted, "A", "L2", "2026-02") == 0.0  # South untouched


def test_units_over_an_all_zero_mix_split_equally_and_overlaps_add():
    events = events_frame([
        ("a", "A", None, "L2", None, "2026-02", "2026-02", None, 30.0, ""),
        ("b", "A", None, None, None, "2026-02", "2026-03", 10.0, None, ""),
        ("c", None, "F1", None, None, "2026-02", "2026-02", None, 40.0, ""),
    ])
    adjusted, audit = apply_event_uplifts(stat_frame(), events, items=ITEMS, locations=LOCATIONS)
    # A/L2 base 0: event a gives all 30; b +10 % of 0; c splits 40 over F1 (A/L1 100, B/L1 300, A/L2 0).
    assert quantity(adjusted, "A", "L2", "2026-02") == pytest.approx(30.0)
    # A/L1 in 2026-02: 100 + 10 (b) + 40 · 100/400 (c) = 120.
    assert quantity(adjusted, "A", "L1", "2026-02") == pytest.approx(120.0)
    assert quantity(adjusted, "A", "L1", "2026-03") == pytest.approx(110.0)
    assert audit.groupby("event")["uplift_units"].sum().to_dict() == pytest.approx({"a": 30.0, "b": 20.0, "c": 40.0})
    # Total added equals the sum of every audit row (nothing invented, nothing lost).
    assert adjusted["quantity"].sum() - stat_frame()["quantity"].sum() == pytest.approx(audit["uplift_units"].sum())


def test_negative_uplift_never_goes_below_zero():
    events = events_frame([("stop", "C", None, None, None, "2026-02", "2026-02", -150.0, None, "")])
    adjusted, _ = apply_event_uplifts(stat_frame(), events, items=ITEMS, locations=LOCATIONS)
    assert quantity(adjusted, "C", "L2", "2026-02") == 0.0


def test_bad_events_are_rejected_and_unmatched_warned():
    for bad in (
        ("x", "A", "F1", None, None, "2026-02", "2026-02", 10.0, None, ""),
        ("x", "A", None, "L1", "North", "2026-02", "2026-02", 10.0, None, ""),
        ("x", "A", None, None, None, "2026-02", "2026-02", 10.0, 5.0, ""),
        ("x", "A", None, None, None, "2026-2", "2026-02", 10.0, None, ""),
        ("x", "A", None, None, None, "2026-04", "2026-02", 10.0, None, ""),
    ):
        with pytest.raises(InvalidSpec):
            apply_event_uplifts(stat_frame(), events_frame([bad]), items=ITEMS, locations=LOCATIONS)
    with pytest.warns(UserWarning, match="match no cell"):
        adjusted, audit = apply_event_uplifts(
            stat_frame(), events_frame([("typo", "Z", None, None, None, "2026-02", "2026-02", 10.0, None, "")]),
            items=ITEMS, locations=LOCATIONS)
    assert audit.empty and adjusted["quantity"].sum() == stat_frame()["quantity"].sum()


def test_uplift_value_added_on_affected_cells():
    actuals = pd.DataFrame({"item": ["A", "A", "B"], "location": ["L1", "L1", "L1"],
                            "period": ["2026-02", "2026-03", "2026-02"], "quantity": [130.0, 95.0, 300.0]})
    stat = stat_frame()
    events = events_frame([("spring", "A", None, "L1", None, "2026-02", "2026-03", 20.0, None, "")])
    adjusted, _ = apply_event_uplifts(stat, events, items=ITEMS, locations=LOCATIONS)
    as_forecast = lambda f: f.assign(source="stat", cycle="2026-01")
    with_uplift = forecast_errors(as_forecast(adjusted), actuals)
    without = forecast_errors(as_forecast(stat), actuals)
    gains = uplift_value_added(with_uplift, without).set_index("lag_bucket")
    # Affected: A/L1 2026-02 (lag 1: |130−100| = 30 -> |130−120| = 10) and 2026-03 (lag 2: 5 -> 25).
    assert gains.loc["1", "mad_gain"] == pytest.approx(20.0) and gains.loc["1", "value_added"]
    assert gains.loc["2-3", "mad_gain"] == pytest.approx(-20.0) and not gains.loc["2-3", "value_added"]
    assert gains.loc["all", "n_cells"] == 2
    assert gains.loc["all", "wape_without"] == pytest.approx(100 * 35 / 225)
    assert gains.loc["all", "wape_with"] == pytest.approx(100 * 35 / 225)
    assert gains.loc["all", "wape_gain"] == pytest.approx(0.0)


def test_numbers_without_the_audit_are_the_numbers_with_it():
    """Skipping the audit's notes (a past cycle being scored) must not move a number (internal consistency)."""
    events = events_frame([
        ("a", "A", None, "L2", None, "2026-02", "2026-02", None, 30.0, ""),
        ("c", None, "F1", None, None, "2026-02", "2026-03", 15.0, None, "spring"),
    ])
    with_audit, audit = apply_event_uplifts(stat_frame(), events, items=ITEMS, locations=LOCATIONS)
    bare, none = apply_event_uplifts(stat_frame(), events, items=ITEMS, locations=LOCATIONS, audit=False)
    assert none is None and len(audit)
    pd.testing.assert_frame_equal(with_audit, bare, check_exact=True)
