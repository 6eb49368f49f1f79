"""Persistent-bias correction: the tracking signal, the switch, the factor, and the level errors it feeds."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from consensus.errors import InvalidSpec
from consensus.methods.bias import (BiasSpec, cell_sums_from_errors, correct_sources, factors_as_known,
                                    persistent_bias, segment_weight_sums)
from consensus.methods.intervals import combined_level_errors, stored_level_bands
from consensus.methods.weights import WeightSpec, estimate_weights_from_sums
from consensus.periods import shift_month

CYCLE = "2026-07"


def sums(errors_by_cycle: dict[str, list[tuple[int, float, float]]], source="sales", segment="F1") -> pd.DataFrame:
    """cell_sums rows [source, cycle, lag, segment, sum_forecast, sum_actual] from (lag, forecast, actual) lists."""
    rows = [{"source": source, "cycle": c, "lag": lag, "segment": segment, "sum_forecast": f, "sum_actual": a}
            for c, entries in errors_by_cycle.items() for lag, f, a in entries]
    return pd.DataFrame(rows)


def past(n: int) -> list[str]:
    return [shift_month(CYCLE, -k) for k in range(n, 0, -1)]


def row(table: pd.DataFrame, bucket="1", source="sales", segment="F1") -> pd.Series:
    return table[(table["lag_bucket"] == bucket) & (table["source"] == source) & (table["segment"] == segment)].iloc[0]


def test_tracking_signal_hand_worked_and_the_limit_is_strict():
    # Hand-worked: every month 110 forecast against 100 actual, e = −10, MAD = 10, so TS = Σe / MAD = −n.
    # Four errors give −4, on the limit (±4, common practice) and so not beyond it; five give −5.
    four = sums({c: [(1, 110.0, 100.0)] for c in past(4)})
    five = sums({c: [(1, 110.0, 100.0)] for c in past(5)})
    spec = BiasSpec()
    at_four = row(persistent_bias(four, cycle=CYCLE, window_cycles=12, segments=["F1"], sources=["sales"], spec=spec))
    at_five = row(persistent_bias(five, cycle=CYCLE, window_cycles=12, segments=["F1"], sources=["sales"], spec=spec))
    assert at_four["tracking_signal"] == pytest.approx(-4.0)
    assert not at_four["persistent"] and at_four["factor"] == 1.0
    assert at_five["tracking_signal"] == pytest.approx(-5.0)
    assert at_five["persistent"]
    # Factor: r = ΣA/ΣF = 500/550, ψ = n/(n + κ) = 5/6, k = 1 + ψ(r − 1) (hand-worked).
    r = 500 / 550
    assert at_five["ratio"] == pytest.approx(r)
    assert at_five["factor"] == pytest.approx(1 + 5 / 6 * (r - 1))
    assert "high" in at_five["note"] and "scaled by" in at_five["note"]


def test_a_bias_from_fewer_cycles_than_min_cycles_is_not_corrected():
    # Six months of errors all −10 (TS = −6) but from two cycles only (three lags each): not persistent yet.
    frame = sums({c: [(lag, 110.0, 100.0) for lag in (1, 2, 3)] for c in past(2)})
    table = persistent_bias(frame, cycle=CYCLE, window_cycles=12, segments=["F1"], sources=["sales"],
                            spec=BiasSpec(min_cycles=3))
    assert row(table)["tracking_signal"] == pytest.approx(-6.0)
    assert not table["persistent"].any() and (table["factor"] == 1.0).all()
    assert "fewer than 3" in row(table)["note"]


def test_a_bias_that_turned_in_the_newest_cycles_is_not_corrected():
    # Old cycles forecast 20 % high, the newest one 5 % low: TS stays beyond −4 but the newest cycles disagree.
    cycles = past(6)
    frame = sums({c: [(1, 120.0, 100.0)] for c in cycles[:5]} | {cycles[5]: [(1, 95.0, 100.0)]})
    table = persistent_bias(frame, cycle=CYCLE, window_cycles=12, segments=["F1"], sources=["sales"],
                            spec=BiasSpec(window_cycles=6))
    assert row(table)["tracking_signal"] < -4
    assert not row(table)["persistent"]


def test_off_and_sources_outside_the_list_are_never_corrected():
    frame = sums({c: [(1, 110.0, 100.0)] for c in past(6)})
    off = persistent_bias(frame, cycle=CYCLE, window_cycles=12, segments=["F1"], sources=["sales"],
                          spec=BiasSpec(mode="off"))
    assert (off["factor"] == 1.0).all() and (off["note"] == "bias correction off").all()
    others = persistent_bias(frame, cycle=CYCLE, window_cycles=12, segments=["F1"], sources=["sales"],
                             spec=BiasSpec(sources=("dc",)))
    assert (others["factor"] == 1.0).all()


@pytest.mark.slow
@settings(max_examples=30, deadline=None)
@given(st.lists(st.floats(min_value=-0.3, max_value=0.3), min_size=3, max_size=12), st.integers(0, 2**31 - 1))
def test_property_a_correction_is_off_when_the_bias_is_not_persistent(shifts, seed):
    # Property: when the newest min_cycles cycles' errors do not share one sign, no factor moves, whatever
    # the size of the older errors; and every factor is 1 exactly when its row is not persistent.
    rng = np.random.default_rng(seed)
    shifts = list(shifts)
    shifts[-1], shifts[-2] = abs(shifts[-1]) + 0.01, -abs(shifts[-2]) - 0.01  # the newest two disagree
    cycles = past(len(shifts))
    frame = sums({c: [(int(lag), 100.0 * (1 + s), 100.0) for lag in rng.integers(1, 8, size=2)]
                  for c, s in zip(cycles, shifts)})
    table = persistent_bias(frame, cycle=CYCLE, window_cycles=12, segments=["F1"], sources=["sales"],
                            spec=BiasSpec(min_cycles=3, window_cycles=12))
    assert not table["persistent"].any()
    assert ((table["factor"] == 1.0) == ~table["persistent"]).all()


def test_correct_sources_scales_only_the_corrected_source():
    table = pd.DataFrame({"segment": ["F1"], "lag_bucket": ["1"], "source": ["sales"], "factor": [0.9]})
    rows = pd.DataFrame({"source": ["sales", "dc", "sales"], "item": "A", "location": "L", "period": "2026-08",
                         "lag": [1, 1, 2], "quantity": [100.0, 80.0, 50.0]})
    out = correct_sources(rows, table, segment_of=np.array(["F1", "F1", "F1"], dtype=object))
    assert out["quantity"].tolist() == pytest.approx([90.0, 80.0, 50.0])
    assert out["bias_factor"].tolist() == pytest.approx([0.9, 1.0, 1.0])


def test_cell_sums_from_errors_are_the_ledgers_sums():
    errors = pd.DataFrame({"source": "sales", "cycle": "2026-06", "lag": [1, 1, 2], "item": ["A", "B", "A"],
                           "forecast": [10.0, 20.0, 5.0], "actual": [8.0, 25.0, 5.0]})
    out = cell_sums_from_errors(errors, segment_of=np.array(["F1"] * 3, dtype=object))
    assert out.loc[out["lag"] == 1, ["sum_forecast", "sum_actual"]].iloc[0].tolist() == [30.0, 33.0]


def test_segment_weight_sums_are_relative_errors_after_the_factor_that_cycle_applied():
    frame = pd.concat([sums({"2026-05": [(1, 110.0, 100.0)], "2026-06": [(1, 120.0, 100.0)]}),
                       sums({"2026-05": [(1, 95.0, 100.0)], "2026-06": [(1, 100.0, 100.0)]}, source="dc")])
    factors = pd.DataFrame({"cycle": ["2026-06"], "segment": ["F1"], "lag_bucket": ["1"], "source": ["sales"],
                            "factor": [0.8]})
    out = segment_weight_sums(frame, factors, cycle=CYCLE, window_cycles=12, sources=["sales", "dc"])
    sales = out[out["source"] == "sales"].set_index("cycle")
    assert sales.loc["2026-05", "sum_err"] == pytest.approx(-0.10)  # (100 − 110) / 100, no factor then
    assert sales.loc["2026-06", "sum_err"] == pytest.approx(0.04)  # (100 − 0.8 · 120) / 100
    weights = estimate_weights_from_sums(out, cycle=CYCLE, segments=["F1"], spec=WeightSpec(min_cycles=2),
                                         sources=["sales", "dc"])
    assert weights.groupby(["segment", "lag_bucket"])["weight"].sum().to_numpy() == pytest.approx(1.0)


def test_factors_as_known_use_only_errors_known_at_each_past_cycle():
    # Lag-1 errors of cycles 2026-01 … 2026-06, all −10.  The run at 2026-05 knew four of them (TS −4, not
    # beyond the limit); the run at 2026-06 five (TS −5). So the factor applied to 2026-06's own errors is a
    # correction, and the one applied to 2026-05's (and earlier) errors is none.
    frame = sums({c: [(1, 110.0, 100.0)] for c in [shift_month("2026-07", -k) for k in range(6, 0, -1)]})
    known = factors_as_known(frame, cycle="2026-08", window_cycles=12, segments=["F1"], sources=["sales"],
                             spec=BiasSpec())
    assert set(known["cycle"]) == {"2026-06"}


def test_combined_level_errors_hand_worked():
    # Two sources, weights ½ each; family A = 100, F₁ = 90, F₂ = 120: r₁ = 0.1, r₂ = −0.2, r = −0.05, so the
    # combination would have forecast 100 · 1.05 = 105 (hand-worked). Two families make the total.
    nodes = pd.DataFrame({"level": "family", "source": ["s1", "s2", "s1", "s2"], "cycle": "2026-05",
                          "node_item": ["F1", "F1", "F2", "F2"], "node_location": "all", "period": "2026-06",
                          "lag": 1, "forecast": [90.0, 120.0, 50.0, 50.0], "actual": [100.0, 100.0, 40.0, 40.0]})
    weights = pd.DataFrame({"segment": ["F1", "F1", "F2", "F2"], "lag_bucket": "1",
                            "source": ["s1", "s2", "s1", "s2"], "weight": 0.5})
    out = combined_level_errors(nodes, weights)
    family = out["family"].set_index("node")
    assert family.loc["F1", "forecast"] == pytest.approx(105.0)
    assert family.loc["F2", "forecast"] == pytest.approx(50.0)
    assert out["total"]["forecast"].iloc[0] == pytest.approx(155.0)
    assert out["total"]["actual"].iloc[0] == pytest.approx(140.0)


def test_stored_level_bands_are_quantiles_of_the_levels_own_relative_errors():
    # Oracle: numpy's quantile of e/F (Williams & Goodman 1971), applied to the family's summed consensus.
    rng = np.random.default_rng(7)
    forecast = rng.uniform(800, 1200, 60)
    actual = forecast * (1 + rng.normal(0, 0.1, 60))
    errors = pd.DataFrame({"cycle": "2026-05", "node": "F1", "period": "2026-06", "lag": 1, "forecast": forecast,
                           "actual": actual})
    items = pd.DataFrame({"item": ["A", "B"], "family": ["F1", "F1"]})
    cells = pd.DataFrame({"item": ["A", "B"], "location": "L", "period": "2026-08", "consensus": [400.0, 600.0]})
    out = stored_level_bands(cells, {"family": errors, "total": errors.assign(node="all")}, items=items,
                             cycle=CYCLE, levels=(0.8,))
    family = out[out["level"] == "family"].iloc[0]
    relative = (actual - forecast) / forecast
    assert family["consensus"] == pytest.approx(1000.0)
    assert family["lower_80"] == pytest.approx(1000 * (1 + np.quantile(relative, 0.1)))
    assert family["upper_80"] == pytest.approx(1000 * (1 + np.quantile(relative, 0.9)))
    assert set(out["level"]) == {"family", "total"}


def test_bias_spec_checks_its_settings():
    with pytest.raises(InvalidSpec):
        BiasSpec(mode="sometimes")
    with pytest.raises(InvalidSpec):
        BiasSpec(min_cycles=4, window_cycles=3)
    with pytest.raises(InvalidSpec):
        BiasSpec(max_ratio=0.5)
