"""Order amplification by distribution center: how much more a DC's orders vary than its customers' demand.

What the DC passes upstream.  The tool does not see the DCs' purchase
orders, only the forecasts each DC submits every cycle.  It stands for the
orders with the replenishment those forecasts imply under an order-up-to
policy with lead time L months, the policy of Lee, Padmanabhan & Whang
(1997, "Information distortion in a supply chain: the bullwhip effect",
Management Science 43(4):546–558) and of Chen, Drezner, Ryan & Simchi-Levi
(2000, "Quantifying the bullwhip effect in a simple supply chain: the impact
of forecasting, lead times, and information", Management Science
46(3):436–443).  At cycle C (order history known through month C) the DC
covers the next L months:

    S_C = Σ_{lag=1..L} F_C(C + lag),     F_C its forecast submitted at cycle C,

and after month C's demand D_C it orders what brings its inventory position
back to S_C:

    q_C = D_C + S_C − S_{C−1}.

So q is demand passed on plus every revision of the DC's cover, which is
exactly where forecasting adds variance upstream.  Negative q (a cover cut
by more than a month's demand) is kept as it comes, as in Chen et al.: the
bound below is a statement about that q.  A constant safety stock cancels in
S_C − S_{C−1}; one re-estimated every cycle would add variance, so this q
understates, never overstates, what a real order stream adds.

Variance ratio (Lee et al. 1997): Var(q) / Var(D), both over the months that
have an implied order, sample variances (ddof = 1).  Variances are measured
per item × DC and pooled over the DC's items as a ratio of sums,
Σ_i Var(q_i) / Σ_i Var(D_i), which is the Var(D)-weighted mean of the item
ratios.  Per item, because upstream plans and makes each item on its own:
on DC totals, items that swing against each other cancel and a common
season dominates, hiding amplification the plant still sees item by item.
Weighted by demand variance, because the items that swing most in units are
the ones that load the supply side, and a slow item's ratio of two tiny,
noisy variances should not count as much as a main item's.

The reference (Chen et al. 2000, from memory): an order-up-to policy whose
lead-time demand is forecast as L times a p-month moving average, facing
AR(1) demand D_t = μ + ρ·D_{t−1} + ε_t, has

    Var(q) / Var(D) ≥ 1 + (2L/p + 2L²/p²)·(1 − ρ^p),

with equality when the safety-stock term does not move; for independent
demand (ρ = 0) the bound is 1 + 2L/p + 2L²/p², and it is then exact for the
moving average itself: q_t = (1 + L/p)·D_t − (L/p)·D_{t−p}, whose variance is
σ²·[(1 + L/p)² + (L/p)²].  The bound is what a p-month moving average forecast
would cost at the least; a DC whose orders vary far more than that passes
upstream more noise than lead time and forecast updating explain.

Out of line: a DC is flagged when its ratio exceeds ``flag_multiple`` times
the bound (default 1.5 × the bound of a 12-month moving average), measured
on at least ``min_months`` months per item.  Both defaults are choices, not
published values: a year of months is the smoothest moving average a monthly
planner would use, so its bound is the smallest reference, and 1.5 leaves
room for the sampling noise of a variance ratio over a few years of months
(a sample variance over 24 months has a relative standard error of about
√(2/23) ≈ 0.3, common statistical fact).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from consensus.errors import InvalidSpec
from consensus.methods.accuracy import month_indexes_factorized
from consensus.periods import month_names

#: Reference moving-average length p (months) for the bound.
DEFAULT_MOVING_AVERAGE_MONTHS = 12
#: Lead time L (months) used when the locations master carries none.
DEFAULT_LEAD_TIME_MONTHS = 1
#: A DC is out of line when its ratio exceeds this multiple of the bound.
DEFAULT_FLAG_MULTIPLE = 1.5
#: Months of implied orders an item × DC needs before it counts.
DEFAULT_MIN_MONTHS = 12

ORDER_COLUMNS = ["item", "location", "period", "lead_time_months", "demand", "cover", "order"]
TABLE_COLUMNS = ["location", "n_series", "n_months", "var_orders", "var_demand", "ratio", "moving_average_months",
                 "lead_time_months", "bound", "limit", "flagged", "explanation"]


def chen_bound(moving_average_months, lead_time_months, *, demand_autocorrelation: float = 0.0):
    """Lower bound of Var(q)/Var(D) for an order-up-to policy with a p-month moving-average forecast.

    1 + (2L/p + 2L²/p²)·(1 − ρ^p) (Chen, Drezner, Ryan & Simchi-Levi 2000,
    Management Science 46(3), from memory), p = ``moving_average_months``,
    L = ``lead_time_months``, ρ = ``demand_autocorrelation`` of AR(1) demand
    (0: independent demand, the bound 1 + 2L/p + 2L²/p²).  Elementwise over
    arrays; a float for scalar input.
    """
    p = np.asarray(moving_average_months, dtype=float)
    lead = np.asarray(lead_time_months, dtype=float)
    rho = float(demand_autocorrelation)
    if np.any(~np.isfinite(p)) or np.any(p < 1) or np.any(p != np.round(p)):
        raise InvalidSpec(f"moving_average_months must be whole months ≥ 1, got {moving_average_months!r}")
    if np.any(~np.isfinite(lead)) or np.any(lead < 0):
        raise InvalidSpec(f"lead_time_months must be ≥ 0, got {lead_time_months!r}")
    if not -1 < rho < 1:
        raise InvalidSpec(f"demand_autocorrelation must lie strictly between -1 and 1, got {rho!r}")
    bound = 1.0 + (2.0 * lead / p + 2.0 * lead**2 / p**2) * (1.0 - rho**p)
    return float(bound) if bound.ndim == 0 else bound


def _lead_times(locations_in_use: pd.Index, locations: pd.DataFrame | None, default: int) -> pd.Series:
    """Lead time in months per DC: the master's lead_time_months where given, else ``default``."""
    lead = pd.Series(float(default), index=locations_in_use, dtype=float)
    if locations is not None and "lead_time_months" in locations.columns:
        given = pd.to_numeric(locations.set_index("location")["lead_time_months"], errors="coerce").dropna()
        given = given[given.index.isin(locations_in_use)]
        lead.loc[given.index] = given.to_numpy(float)
    bad = lead[(lead < 1) | (lead != np.round(lead))]
    if len(bad):
        raise InvalidSpec(f"lead_time_months must be whole months ≥ 1; {bad.index[0]} has {bad.iloc[0]!r}")
    return lead.astype(int)


def _monthly_demand(actuals: pd.DataFrame) -> pd.DataFrame:
    """Demand per item × location × month, 0 where a known series has no row in a month with actuals.

    The zero rule of :func:`consensus.methods.accuracy.forecast_errors`: order
    history lists what was ordered, so a series seen in some month had no
    orders in a month where other series have rows.
    """
    act = actuals.assign(_m=month_indexes_factorized(actuals["period"]))
    summed = act.groupby(["item", "location", "_m"], sort=True)["quantity"].sum()
    wide = summed.unstack("_m", fill_value=0.0)
    return wide.stack().rename("demand").reset_index()


def implied_orders(dc_forecasts: pd.DataFrame, actuals: pd.DataFrame, *, locations: pd.DataFrame | None = None,
                   lead_time_months: int = DEFAULT_LEAD_TIME_MONTHS) -> pd.DataFrame:
    """The order stream a DC's successive forecasts imply: q_C = D_C + S_C − S_{C−1}.

    ``dc_forecasts``: [cycle, item, location, period, quantity] (``lag`` used
    if present, else period − cycle), one row per cell and cycle — filter to
    the DC source first.  ``actuals``: [item, location, period, quantity].
    S_C = Σ_{lag=1..L} F_C(C + lag) is the cover the DC's cycle-C forecast
    asks for over its lead time L (``locations.lead_time_months`` per DC where
    the master has it, else ``lead_time_months``); D_C is month C's demand.
    A month gets an order only when both cycles C and C − 1 forecast every lag
    1..L and month C's demand is known.  See the module docstring for why
    this stands for what the DC passes upstream (Lee et al. 1997; Chen et al.
    2000).

    Returns [item, location, period, lead_time_months, demand, cover, order],
    period = C (the month the order is placed at the end of), cover = S_C.
    """
    missing = [c for c in ("cycle", "item", "location", "period", "quantity") if c not in dc_forecasts.columns]
    if missing:
        raise ValueError(f"dc_forecasts lacks columns {missing}")
    if not isinstance(lead_time_months, (int, np.integer)) or lead_time_months < 1:
        raise InvalidSpec(f"lead_time_months must be a whole number of months ≥ 1, got {lead_time_months!r}")
    if dc_forecasts.empty or actuals.empty:
        return pd.DataFrame({c: pd.Series(dtype=object if c in ("item", "location", "period") else float)
                             for c in ORDER_COLUMNS})
    cycle_m = month_indexes_factorized(dc_forecasts["cycle"])
    lag = (dc_forecasts["lag"].to_numpy(int) if "lag" in dc_forecasts.columns
           else month_indexes_factorized(dc_forecasts["period"]) - cycle_m)
    location_codes, location_names = pd.factorize(dc_forecasts["location"])
    lead = _lead_times(pd.Index(location_names), locations, lead_time_months)
    lead_of_row = lead.to_numpy(int)[location_codes]
    within = (lag >= 1) & (lag <= lead_of_row)  # only the lead-time lags enter S_C
    frame = pd.DataFrame({"item": dc_forecasts["item"].to_numpy()[within],
                          "location": dc_forecasts["location"].to_numpy()[within],
                          "_m": cycle_m[within], "_lag": lag[within],
                          "quantity": dc_forecasts["quantity"].to_numpy(float)[within]})
    duplicated = frame.duplicated(["item", "location", "_m", "_lag"])
    if duplicated.any():
        first = frame.loc[duplicated, ["item", "location"]].iloc[0].to_dict()
        raise ValueError(f"dc_forecasts has more than one row for {first} in one cycle and month: "
                         "pass one source's aligned forecast")
    grouped = frame.groupby(["item", "location", "_m"], sort=True)["quantity"]
    cover = pd.concat([grouped.sum().rename("cover"), grouped.count().rename("n_lags")], axis=1).reset_index()
    cover["lead_time_months"] = cover["location"].map(lead).to_numpy(int)  # one row per item, DC and cycle
    cover = cover[cover["n_lags"] == cover["lead_time_months"]].drop(columns="n_lags")
    previous = cover[["item", "location", "_m", "cover"]].assign(_m=cover["_m"] + 1).rename(
        columns={"cover": "previous_cover"})
    orders = cover.merge(previous, on=["item", "location", "_m"], how="inner")
    orders = orders.merge(_monthly_demand(actuals), on=["item", "location", "_m"], how="inner")
    orders["order"] = orders["demand"] + orders["cover"] - orders["previous_cover"]
    orders["period"] = month_names(orders["_m"].to_numpy())
    orders = orders.sort_values(["location", "item", "_m"], kind="mergesort").reset_index(drop=True)
    return orders[ORDER_COLUMNS]


def _explain(row: pd.Series, *, min_months: int) -> str:
    """One plain sentence on a DC's amplification for the pack."""
    where = f"{row['location']}"
    reference = (f"the {row['bound']:.2f} that a {int(row['moving_average_months'])}-month moving average with a "
                 f"{int(row['lead_time_months'])}-month lead time would give at the least")
    limit = f"the limit of {row['limit']:.2f} ({row['limit'] / row['bound']:g} times {reference})"
    if row["n_series"] == 0:
        return (f"{where}: no item has {min_months} months of successive forecasts and demand yet, "
                "so amplification is not measured.")
    if not np.isfinite(row["ratio"]):
        return f"{where}: its customers' demand did not vary over the months measured, so there is no ratio."
    times = f"the orders its forecasts imply vary {row['ratio']:.2f} times as much as the customer demand it serves"
    if row["flagged"]:
        return (f"{where}: {times}, above {limit}, so it passes more swing upstream than lead time and "
                "forecast updates explain.")
    if row["ratio"] < row["bound"]:
        return f"{where}: {times}, less than {reference}, so it passes demand upstream smoothly."
    return f"{where}: {times}, within {limit}."


def measure_amplification(dc_forecasts: pd.DataFrame, actuals: pd.DataFrame, *,
                          locations: pd.DataFrame | None = None,
                          lead_time_months: int = DEFAULT_LEAD_TIME_MONTHS,
                          moving_average_months: int = DEFAULT_MOVING_AVERAGE_MONTHS,
                          flag_multiple: float = DEFAULT_FLAG_MULTIPLE,
                          min_months: int = DEFAULT_MIN_MONTHS) -> pd.DataFrame:
    """Variance ratio of each DC's implied orders to its demand, against the Chen et al. bound.

    Orders from :func:`implied_orders`.  Per item × DC with at least
    ``min_months`` months of orders: Var(q_i) and Var(D_i) over the same
    months (ddof = 1).  Per DC: ratio = Σ_i Var(q_i) / Σ_i Var(D_i) (Lee,
    Padmanabhan & Whang 1997), bound = 1 + 2L/p + 2L²/p² (Chen et al. 2000,
    p = ``moving_average_months``, L the DC's lead time), limit =
    ``flag_multiple`` · bound, flagged when ratio > limit.

    Returns one row per DC in the forecasts: [location, n_series, n_months,
    var_orders, var_demand, ratio, moving_average_months, lead_time_months,
    bound, limit, flagged, explanation]; var_orders and var_demand are the
    sums over the DC's measured items (units² per month), n_months the
    distinct months they span.
    """
    if not isinstance(min_months, (int, np.integer)) or min_months < 2:
        raise InvalidSpec(f"min_months must be a whole number ≥ 2 (a variance needs two months), got {min_months!r}")
    if not np.isfinite(flag_multiple) or flag_multiple < 1:
        raise InvalidSpec(f"flag_multiple must be ≥ 1 (the bound is already a minimum), got {flag_multiple!r}")
    chen_bound(moving_average_months, lead_time_months)  # checks p and L
    orders = implied_orders(dc_forecasts, actuals, locations=locations, lead_time_months=lead_time_months)
    dcs = pd.Index(sorted(dc_forecasts["location"].unique()), name="location")
    lead = _lead_times(dcs, locations, lead_time_months) if len(dcs) else pd.Series(dtype=int)
    grouped = orders.groupby(["location", "item"], sort=True)
    per_series = pd.DataFrame({"n": grouped["order"].size(), "var_orders": grouped["order"].var(ddof=1),
                               "var_demand": grouped["demand"].var(ddof=1)}).reset_index()
    measured = per_series[per_series["n"] >= min_months]
    kept = orders.merge(measured[["location", "item"]], on=["location", "item"], how="inner")
    table = pd.DataFrame(index=dcs)
    sums = measured.groupby("location")[["var_orders", "var_demand"]].sum()
    table["n_series"] = measured.groupby("location").size().reindex(dcs).fillna(0).astype(int)
    table["n_months"] = kept.groupby("location")["period"].nunique().reindex(dcs).fillna(0).astype(int)
    table["var_orders"] = sums["var_orders"].reindex(dcs)
    table["var_demand"] = sums["var_demand"].reindex(dcs)
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = table["var_orders"].to_numpy(float) / table["var_demand"].to_numpy(float)
    table["ratio"] = np.where(table["var_demand"].to_numpy(float) > 0, ratio, np.nan)
    table["moving_average_months"] = int(moving_average_months)
    table["lead_time_months"] = lead.reindex(dcs).to_numpy(int) if len(dcs) else np.array([], dtype=int)
    table["bound"] = chen_bound(moving_average_months, table["lead_time_months"].to_numpy(float))
    table["limit"] = float(flag_multiple) * table["bound"]
    table["flagged"] = np.nan_to_num(table["ratio"].to_numpy(float), nan=-np.inf) > table["limit"].to_numpy(float)
    table = table.reset_index()
    table["explanation"] = [_explain(row, min_months=min_months) for _, row in table.iterrows()]  # one per DC
    return table[TABLE_COLUMNS]
