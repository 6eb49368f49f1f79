"""Order amplification: a hand-worked DC, the Chen et al. (2000) bound on simulated order-up-to policies."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from consensus.errors import InvalidSpec
from consensus.methods.amplification import chen_bound, implied_orders, measure_amplification
from consensus.periods import month_index, month_names

MONTHS = [f"2026-{m:02d}" for m in range(1, 7)]


def hand_example() -> tuple[pd.DataFrame, pd.DataFrame]:
    """Two DCs, one item each, six cycles of lag-1 forecasts (plus lag-2 rows a 1-month lead time ignores)."""
    demand = {"DC-X": [10, 14, 8, 12, 16, 12], "DC-Y": [5, 7, 6, 9, 4, 8]}
    lag1 = {"DC-X": [11, 13, 10, 11, 14, 13], "DC-Y": [12, 12, 12, 12, 12, 12]}
    actuals = pd.DataFrame([{"item": "KIT-A", "location": dc, "period": m, "quantity": float(q)}
                            for dc, values in demand.items() for m, q in zip(MONTHS, values)])
    rows = []
    for dc, values in lag1.items():
        for cycle, f in zip(MONTHS, values):
            nxt = month_names([month_index(cycle) + 1, month_index(cycle) + 2])
            rows.append({"cycle": cycle, "item": "KIT-A", "location": dc, "period": nxt[0], "quantity": float(f)})
            rows.append({"cycle": cycle, "item": "KIT-A", "location": dc, "period": nxt[1], "quantity": 99.0})
    return pd.DataFrame(rows), actuals


def test_implied_orders_by_hand():
    # q_C = D_C + S_C − S_{C−1}, S_C = the lag-1 forecast (L = 1):
    # DC-X: C=02: 14 + 13 − 11 = 16; 03: 8 + 10 − 13 = 5; 04: 12 + 11 − 10 = 13; 05: 16 + 14 − 11 = 19;
    # 06: 12 + 13 − 14 = 11.  The first cycle has no previous cover, so no order.
    forecasts, actuals = hand_example()
    orders = implied_orders(forecasts, actuals, lead_time_months=1)
    x = orders[orders["location"] == "DC-X"]
    assert list(x["period"]) == MONTHS[1:]
    assert list(x["order"]) == [16.0, 5.0, 13.0, 19.0, 11.0]
    assert list(x["demand"]) == [14.0, 8.0, 12.0, 16.0, 12.0]
    # DC-Y never revises its cover, so it passes demand on unchanged.
    y = orders[orders["location"] == "DC-Y"]
    assert list(y["order"]) == list(y["demand"]) == [7.0, 6.0, 9.0, 4.0, 8.0]


def test_amplification_table_by_hand():
    # DC-X, months 02..06.  Orders 16, 5, 13, 19, 11: mean 12.8, squared deviations 10.24 + 60.84 + 0.04 +
    # 38.44 + 3.24 = 112.8, Var = 112.8 / 4 = 28.2.  Demand 14, 8, 12, 16, 12: mean 12.4, squared deviations
    # 2.56 + 19.36 + 0.16 + 12.96 + 0.16 = 35.2, Var = 8.8.  Ratio 28.2 / 8.8 = 3.2045.
    # Bound (Chen et al. 2000) for p = 12, L = 1: 1 + 2/12 + 2/144 = 1.180556; limit 1.5 × that = 1.770833.
    forecasts, actuals = hand_example()
    table = measure_amplification(forecasts, actuals, min_months=5).set_index("location")
    x = table.loc["DC-X"]
    assert x["n_series"] == 1 and x["n_months"] == 5
    assert x["var_orders"] == pytest.approx(28.2)
    assert x["var_demand"] == pytest.approx(8.8)
    assert x["ratio"] == pytest.approx(28.2 / 8.8)
    assert x["bound"] == pytest.approx(1 + 2 / 12 + 2 / 144)
    assert x["limit"] == pytest.approx(1.5 * (1 + 2 / 12 + 2 / 144))
    assert bool(x["flagged"]) and "above the limit of 1.77" in x["explanation"]
    y = table.loc["DC-Y"]
    assert y["ratio"] == pytest.approx(1.0) and not bool(y["flagged"])
    assert "smoothly" in y["explanation"]


def test_lead_time_from_the_locations_master():
    # DC-X with L = 2: S_C = F_C(C+1) + F_C(C+2) = lag-1 forecast + 99.  The 99s cancel in S_C − S_{C−1},
    # so the orders are DC-X's orders of the L = 1 example; the bound for p = 12, L = 2 is
    # 1 + 4/12 + 8/144 = 1.388889.  DC-Y keeps the default L = 1.
    forecasts, actuals = hand_example()
    locations = pd.DataFrame({"location": ["DC-X", "DC-Y"], "lead_time_months": [2, None]})
    orders = implied_orders(forecasts, actuals, locations=locations)
    x = orders[orders["location"] == "DC-X"]
    assert list(x["order"]) == [16.0, 5.0, 13.0, 19.0, 11.0]
    assert list(x["cover"]) == [13 + 99.0, 10 + 99.0, 11 + 99.0, 14 + 99.0, 13 + 99.0]
    table = measure_amplification(forecasts, actuals, locations=locations, min_months=5).set_index("location")
    assert table.loc["DC-X", "lead_time_months"] == 2
    assert table.loc["DC-X", "bound"] == pytest.approx(1 + 4 / 12 + 8 / 144)
    assert table.loc["DC-Y", "lead_time_months"] == 1


def test_a_missing_cycle_drops_the_months_it_touches():
    forecasts, actuals = hand_example()
    forecasts = forecasts[forecasts["cycle"] != "2026-03"]
    x = implied_orders(forecasts, actuals)
    x = x[x["location"] == "DC-X"]
    # Cycle 03 gone: no order at 03 (no S_03) nor at 04 (no S_{03}); 02, 05, 06 as before.
    assert list(x["period"]) == ["2026-02", "2026-05", "2026-06"]
    assert list(x["order"]) == [16.0, 19.0, 11.0]


def test_too_few_months_are_not_measured():
    forecasts, actuals = hand_example()
    table = measure_amplification(forecasts, actuals, min_months=12)
    assert (table["n_series"] == 0).all() and table["ratio"].isna().all() and not table["flagged"].any()
    assert "not measured" in table["explanation"].iloc[0]


def test_bound_is_the_variance_of_the_moving_average_policy():
    # For i.i.d. demand, q_t = D_t + (L/p)(D_t − D_{t−p}) = (1 + L/p)·D_t − (L/p)·D_{t−p}, so
    # Var(q)/σ² is the sum of the squared filter weights (variance of a linear filter of white noise,
    # common statistical fact); Chen et al. (2000) write it 1 + 2L/p + 2L²/p².
    for p in (1, 3, 6, 12):
        for lead in (0, 1, 2, 4):
            weights = np.zeros(p + 1)
            weights[0], weights[p] = 1 + lead / p, -lead / p
            assert chen_bound(p, lead) == pytest.approx(float(np.sum(weights**2)))
    # The AR(1) factor (1 − ρ^p): p = 3, L = 1, ρ = 0.6 → 1 + (2/3 + 2/9)·(1 − 0.216) = 1.696889.
    assert chen_bound(3, 1, demand_autocorrelation=0.6) == pytest.approx(1 + (2 / 3 + 2 / 9) * (1 - 0.216))
    with pytest.raises(InvalidSpec):
        chen_bound(0, 1)
    with pytest.raises(InvalidSpec):
        chen_bound(3, 1, demand_autocorrelation=1.0)


def simulate_policy(*, p: int, lead: int, rho: float = 0.0, z: float = 0.0, n_items: int = 300, n_months: int = 240,
                    seed: int = 0) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Chen et al.'s (2000) setting, invented data: AR(1) demand per item, D_t = μ + ρ(D_{t−1} − μ) + ε_t,
    σ_ε = 10, μ = 100, and a DC that forecasts every lag with the p-month moving average and adds
    z·σ̂·√L of safety stock (σ̂ the standard deviation of the same p months), spread over its L lags."""
    rng = np.random.default_rng(seed)
    eps = rng.normal(0.0, 10.0, size=(n_items, n_months + 200))
    d = np.empty_like(eps)
    d[:, 0] = 100.0 + eps[:, 0] / np.sqrt(1 - rho**2)
    for t in range(1, d.shape[1]):  # the AR(1) recursion runs over months, vectorised over items
        d[:, t] = 100.0 + rho * (d[:, t - 1] - 100.0) + eps[:, t]
    d = d[:, 200:]  # burn-in
    windows = np.lib.stride_tricks.sliding_window_view(d, p, axis=1)  # windows[:, k] = months k .. k+p−1
    mean = windows.mean(axis=2)
    sd = windows.std(axis=2, ddof=1) if p > 1 else np.zeros_like(mean)
    per_lag = mean + z * sd * np.sqrt(lead) / lead  # S = L·mean + z·σ̂·√L
    first = month_index("2010-01")
    cycle_idx = np.arange(p - 1, n_months)  # the cycle at month c knows months c−p+1 .. c
    items = np.array([f"IT-{i:04d}" for i in range(n_items)])
    forecasts = []
    for lag in range(1, lead + 1):
        forecasts.append(pd.DataFrame({
            "cycle": np.tile(month_names(first + cycle_idx), n_items),
            "item": np.repeat(items, len(cycle_idx)),
            "location": "DC-SIM",
            "period": np.tile(month_names(first + cycle_idx + lag), n_items),
            "quantity": per_lag.ravel()}))
    actuals = pd.DataFrame({"item": np.repeat(items, n_months), "location": "DC-SIM",
                            "period": np.tile(month_names(first + np.arange(n_months)), n_items),
                            "quantity": d.ravel()})
    return pd.concat(forecasts, ignore_index=True), actuals


@pytest.mark.slow
@pytest.mark.parametrize("p,lead", [(3, 1), (6, 2), (12, 1)])
def test_simulated_moving_average_meets_the_bound_for_iid_demand(p, lead):
    # Chen et al. (2000): with i.i.d. demand and a constant safety stock the bound holds with equality
    # (from memory; the filter identity in test_bound_is_the_variance_of_the_moving_average_policy shows why).
    # 300 items × ~230 months pool the sampling error of the ratio to about 1 %; we allow 4 %.
    forecasts, actuals = simulate_policy(p=p, lead=lead, seed=p * 10 + lead)
    row = measure_amplification(forecasts, actuals, moving_average_months=p, lead_time_months=lead).iloc[0]
    assert row["ratio"] == pytest.approx(chen_bound(p, lead), rel=0.04)


def test_simulated_safety_stock_updates_only_add_variance():
    # With z·σ̂ re-estimated every cycle the ratio is above the bound (Chen et al. 2000: the bound is a
    # lower bound; for symmetric i.i.d. demand the σ̂ term is uncorrelated with the mean term).
    p, lead = 3, 2
    forecasts, actuals = simulate_policy(p=p, lead=lead, z=1.65, seed=5)
    row = measure_amplification(forecasts, actuals, moving_average_months=p, lead_time_months=lead).iloc[0]
    assert row["ratio"] > chen_bound(p, lead) * 1.05


def test_simulated_ar1_demand_meets_the_ar1_bound():
    # Chen et al. (2000), AR(1) demand with ρ = 0.6: 1 + (2L/p + 2L²/p²)(1 − ρ^p), exact for a constant
    # safety stock (from memory).  Positively correlated demand amplifies less than the i.i.d. bound says.
    p, lead, rho = 3, 1, 0.6
    forecasts, actuals = simulate_policy(p=p, lead=lead, rho=rho, seed=11)
    row = measure_amplification(forecasts, actuals, moving_average_months=p, lead_time_months=lead).iloc[0]
    assert row["ratio"] == pytest.approx(chen_bound(p, lead, demand_autocorrelation=rho), rel=0.04)
    assert row["ratio"] < chen_bound(p, lead)


def test_options_are_checked():
    forecasts, actuals = hand_example()
    with pytest.raises(InvalidSpec):
        measure_amplification(forecasts, actuals, flag_multiple=0.5)
    with pytest.raises(InvalidSpec):
        measure_amplification(forecasts, actuals, min_months=1)
    with pytest.raises(InvalidSpec):
        implied_orders(forecasts, actuals, lead_time_months=0)
    with pytest.raises(InvalidSpec):
        implied_orders(forecasts, actuals, locations=pd.DataFrame({"location": ["DC-X"], "lead_time_months": [1.5]}))
    with pytest.raises(ValueError):
        implied_orders(pd.concat([forecasts, forecasts.iloc[:1]]), actuals)
