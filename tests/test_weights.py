"""Source weights: the spec, the schemes, the fallbacks and Bates–Granger."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.optimize import minimize_scalar

from consensus.errors import InvalidSpec
from consensus.methods.weights import SCHEMES, WeightSpec, bates_granger_pair, estimate_weights
from consensus.periods import horizon_months, lag_bucket_labels, lags, month_range

ITEMS = pd.DataFrame({"item": ["A", "B", "C"], "family": ["F1", "F1", "F2"], "unit_price": [1.0, 1.0, 1.0]})
LOCATIONS = pd.DataFrame({"location": ["L1", "L2"], "region": ["North", "South"]})


def make_errors(error_by_source: dict[str, np.ndarray], cycles: list[str], horizon: int = 3,
                cells=(("A", "L1"), ("B", "L1"), ("C", "L2"))) -> pd.DataFrame:
    """Error rows for every source × cycle × planned month × cell, errors taken in order."""
    base = pd.DataFrame(
        [(c, p, i, l) for c in cycles for p in horizon_months(c, horizon) for i, l in cells],
        columns=["cycle", "period", "item", "location"],
    )
    frames = []
    for source, errs in error_by_source.items():
        frame = base.assign(source=source, error=np.resize(np.asarray(errs, float), len(base)))
        frames.append(frame)
    out = pd.concat(frames, ignore_index=True)
    out["lag"] = lags(out["cycle"], out["period"])
    out["lag_bucket"] = lag_bucket_labels(out["lag"])
    out["actual"] = 100.0
    out["forecast"] = out["actual"] - out["error"]
    return out


CYCLES = month_range("2025-01", "2025-12")


def test_inverse_mse_weights_from_4_16_64():
    # Bates & Granger (1969) inverse-variance weights: 1/4 : 1/16 : 1/64 = 16 : 4 : 1
    # -> 0.7619, 0.1905, 0.0476 (each source's errors are ±σ so its MSE is exactly σ²).
    rng = np.random.default_rng(0)
    signs = rng.choice([-1.0, 1.0], size=2000)
    errors = make_errors({"sales": 2 * signs, "stat": 4 * signs, "dc": 8 * signs}, CYCLES)
    weights = estimate_weights(errors, cycle="2026-01", items=ITEMS, locations=LOCATIONS,
                               spec=WeightSpec(scheme="inverse_mse", segment="all"), sources=["sales", "stat", "dc"])
    lag1 = weights[weights["lag_bucket"] == "1"].set_index("source")
    assert lag1.loc["sales", "mse"] == pytest.approx(4.0)
    assert lag1.loc["sales", "weight"] == pytest.approx(0.7619, abs=5e-5)
    assert lag1.loc["stat", "weight"] == pytest.approx(0.1905, abs=5e-5)
    assert lag1.loc["dc", "weight"] == pytest.approx(0.0476, abs=5e-5)


def test_bates_granger_pair_worked_example():
    # Bates & Granger (1969): σ1 = 2, σ2 = 4, ρ = 0 -> w1 = 16/20 = 0.8, σc² = 64/20 = 3.2.
    w1, variance = bates_granger_pair(2.0, 4.0, 0.0)
    assert w1 == pytest.approx(0.8)
    assert variance == pytest.approx(3.2)


@pytest.mark.parametrize("sigma1,sigma2,rho", [(2.0, 4.0, 0.3), (1.0, 1.5, -0.4), (3.0, 2.0, 0.6)])
def test_bates_granger_pair_is_the_variance_minimum(sigma1, sigma2, rho):
    # Independent check with scipy: minimise Var(w e1 + (1−w) e2) over w numerically.
    def variance(w):
        return w**2 * sigma1**2 + (1 - w) ** 2 * sigma2**2 + 2 * w * (1 - w) * rho * sigma1 * sigma2

    best = minimize_scalar(variance, bounds=(-5, 5), method="bounded", options={"xatol": 1e-10})
    w1, combined = bates_granger_pair(sigma1, sigma2, rho)
    assert w1 == pytest.approx(best.x, abs=1e-6)
    assert combined == pytest.approx(variance(best.x), rel=1e-8)


def test_spec_rejects_values_outside_the_closed_sets():
    for bad in ({"scheme": "median"}, {"segment": "country"}, {"window_cycles": 0}, {"discount": 0.0},
                {"discount": 1.5}, {"min_cycles": 20}, {"window_cycles": 2.5}, {"bias_correction": "yes"}):
        with pytest.raises(InvalidSpec):
            WeightSpec(**bad)
    assert WeightSpec().scheme == "shrunk_mse" and WeightSpec().segment == "family"


def test_window_uses_only_cycles_before_the_current_one_and_known_actuals():
    # Errors of the current cycle (or later) must be ignored: make them huge.
    errors = make_errors({"sales": [1.0], "stat": [2.0]}, month_range("2025-01", "2025-12"))
    late = make_errors({"sales": [1000.0], "stat": [1.0]}, month_range("2026-01", "2026-03"))
    both = pd.concat([errors, late], ignore_index=True)
    spec = WeightSpec(scheme="inverse_mse", segment="all", window_cycles=6)
    weights = estimate_weights(both, cycle="2026-01", items=ITEMS, locations=LOCATIONS, spec=spec,
                               sources=["sales", "stat"])
    lag1 = weights[weights["lag_bucket"] == "1"].set_index("source")
    assert lag1.loc["sales", "weight"] == pytest.approx(0.8)  # 1/1 : 1/4
    # Window of 6 cycles: 2025-07 … 2025-12; lag-3 forecast of 2025-12 (period 2026-03) not yet known.
    assert lag1.loc["sales", "n_cycles"] == 6
    lag23 = weights[weights["lag_bucket"] == "2-3"].set_index("source")
    # lag 2 of cycle 2025-12 is 2026-02 > 2026-01: unknown; lag 2 & 3 of 2025-07…2025-10 and lag 2 of 2025-11.
    assert lag23.loc["sales", "n_errors"] == (4 * 2 + 1) * 3


def test_fallback_segment_to_all_to_equal_is_reported():
    # Family F2 (item C) has history only for 2 cycles: falls back to all families pooled.
    errors = make_errors({"sales": [1.0], "stat": [3.0]}, CYCLES, cells=(("A", "L1"), ("B", "L1")))
    errors_c = make_errors({"sales": [1.0], "stat": [3.0]}, CYCLES[-2:], cells=(("C", "L2"),))
    both = pd.concat([errors, errors_c], ignore_index=True)
    weights = estimate_weights(both, cycle="2026-01", items=ITEMS, locations=LOCATIONS,
                               spec=WeightSpec(scheme="inverse_mse"), sources=["sales", "stat"])
    f2 = weights[(weights["segment"] == "F2") & (weights["lag_bucket"] == "1")].set_index("source")
    assert set(f2["basis"]) == {"all"}
    assert "pooled" in f2["note"].iloc[0] and "< 3" in f2["note"].iloc[0]
    assert f2.loc["sales", "weight"] == pytest.approx(0.9)
    # Lag buckets nobody forecast at: equal weights, said so.
    far = weights[weights["lag_bucket"] == "7+"]
    assert set(far["basis"]) == {"equal"} and np.allclose(far["weight"], 0.5)
    assert far["note"].str.contains("equal weights").all()
    # Every (segment, lag bucket) × source row exists.
    assert len(weights) == 2 * 4 * 2


def test_new_source_without_history_pulls_its_segment_to_equal_weights():
    errors = make_errors({"sales": [1.0], "stat": [3.0]}, CYCLES)
    weights = estimate_weights(errors, cycle="2026-01", items=ITEMS, locations=LOCATIONS,
                               spec=WeightSpec(scheme="inverse_mse", segment="region"),
                               sources=["sales", "stat", "marketing"])
    lag1 = weights[weights["lag_bucket"] == "1"]
    assert set(lag1["basis"]) == {"equal"}
    assert np.allclose(lag1["weight"], 1 / 3)
    assert set(weights["segment"]) == {"North", "South"}


def test_discounted_mse_favours_the_recently_better_source():
    # sales was poor long ago and good recently; stat the other way round.
    n_per_cycle = 3 * 3
    early, recent = CYCLES[:6], CYCLES[6:]
    sales = [5.0] * n_per_cycle * 6 + [1.0] * n_per_cycle * 6
    stat = [1.0] * n_per_cycle * 6 + [5.0] * n_per_cycle * 6
    errors = make_errors({"sales": sales, "stat": stat}, early + recent)
    common = dict(cycle="2026-01", items=ITEMS, locations=LOCATIONS, sources=["sales", "stat"])
    plain = estimate_weights(errors, spec=WeightSpec(scheme="inverse_mse", segment="all"), **common)
    discounted = estimate_weights(errors, spec=WeightSpec(scheme="discounted_mse", segment="all", discount=0.7),
                                  **common)
    w_plain = plain[plain["lag_bucket"] == "1"].set_index("source")["weight"]
    w_disc = discounted[discounted["lag_bucket"] == "1"].set_index("source")["weight"]
    assert w_disc["sales"] > w_plain["sales"]
    assert w_disc["sales"] > 0.5


def test_best_scheme_and_shrinkage_toward_equal():
    errors = make_errors({"sales": [1.0], "stat": [2.0], "dc": [4.0]}, CYCLES)
    common = dict(cycle="2026-01", items=ITEMS, locations=LOCATIONS, sources=["sales", "stat", "dc"])
    best = estimate_weights(errors, spec=WeightSpec(scheme="best", segment="all"), **common)
    lag1 = best[best["lag_bucket"] == "1"].set_index("source")["weight"]
    assert lag1.to_dict() == {"dc": 0.0, "sales": 1.0, "stat": 0.0}
    shrunk = estimate_weights(errors, spec=WeightSpec(scheme="shrunk_mse", segment="all", shrinkage_cycles=4.0),
                              **common)
    row = shrunk[shrunk["lag_bucket"] == "1"].set_index("source")
    psi = 12 / (12 + 4)
    assert row["psi"].iloc[0] == pytest.approx(psi)
    assert row.loc["sales", "weight"] == pytest.approx(psi * row.loc["sales", "raw_weight"] + (1 - psi) / 3)


# ---------------------------------------------------------------- properties

error_values = st.lists(st.floats(min_value=-50, max_value=50, allow_nan=False, allow_infinity=False),
                        min_size=5, max_size=40)


@pytest.mark.slow
@settings(max_examples=20, deadline=None)
@given(st.lists(error_values, min_size=2, max_size=4), st.sampled_from(SCHEMES), st.sampled_from(["family", "all"]))
def test_weights_non_negative_sum_to_one_and_ignore_source_order(per_source, scheme, segment):
    names = [f"s{k}" for k in range(len(per_source))]
    errors = make_errors(dict(zip(names, per_source)), CYCLES[-5:])
    spec = WeightSpec(scheme=scheme, segment=segment)
    forward = estimate_weights(errors, cycle="2026-01", items=ITEMS, locations=LOCATIONS, spec=spec, sources=names)
    backward = estimate_weights(errors.iloc[::-1], cycle="2026-01", items=ITEMS, locations=LOCATIONS, spec=spec,
                                sources=names[::-1])
    assert (forward["weight"] >= 0).all()
    sums = forward.groupby(["segment", "lag_bucket"])["weight"].sum()
    np.testing.assert_allclose(sums.to_numpy(), 1.0, rtol=0, atol=1e-12)
    pd.testing.assert_frame_equal(forward, backward)


@pytest.mark.slow
@settings(max_examples=30, deadline=None)
@given(st.lists(error_values, min_size=2, max_size=4))
def test_equal_scheme_gives_the_mean(per_source):
    names = [f"s{k}" for k in range(len(per_source))]
    errors = make_errors(dict(zip(names, per_source)), CYCLES[-4:])
    weights = estimate_weights(errors, cycle="2026-01", items=ITEMS, locations=LOCATIONS,
                               spec=WeightSpec(scheme="equal"), sources=names)
    np.testing.assert_allclose(weights["weight"], 1 / len(names))


@pytest.mark.slow
@settings(max_examples=30, deadline=None)
@given(st.lists(error_values, min_size=2, max_size=4),
       st.floats(min_value=0.01, max_value=100, allow_nan=False),
       st.sampled_from(["inverse_mse", "inverse_mad", "discounted_mse", "shrunk_mse"]))
def test_scaling_all_errors_leaves_inverse_weights_unchanged(per_source, factor, scheme):
    names = [f"s{k}" for k in range(len(per_source))]
    errors = make_errors(dict(zip(names, per_source)), CYCLES[-6:])
    scaled = errors.assign(error=errors["error"] * factor)
    common = dict(cycle="2026-01", items=ITEMS, locations=LOCATIONS, spec=WeightSpec(scheme=scheme), sources=names)
    np.testing.assert_allclose(estimate_weights(errors, **common)["weight"],
                               estimate_weights(scaled, **common)["weight"], rtol=1e-9, atol=1e-12)
