"""Error bands: numpy quantile oracle, normal-distribution facts, interval score examples, calibration backtest."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from consensus.errors import InvalidSpec
from consensus.methods.intervals import backtest_bands, empirical_bands, interval_coverage, winkler_score


def relative_errors(n, lag_bucket, sd, seed):
    rng = np.random.default_rng(seed)
    forecast = rng.uniform(20, 500, size=n)
    return pd.DataFrame({"lag_bucket": lag_bucket, "forecast": forecast,
                         "actual": forecast * (1 + rng.normal(0, sd, size=n))})


def test_winkler_score_examples():
    # Interval score (Winkler, 1972; Gneiting & Raftery, 2007, eq. 43): 80% interval [80, 120]:
    # y = 100 inside → width 40; y = 130 → 40 + (2/0.2)·10 = 140; y = 70 → also 140 by symmetry.
    np.testing.assert_allclose(winkler_score([80, 80, 80], [120, 120, 120], [100, 130, 70], level=0.8),
                               [40.0, 140.0, 140.0])


def test_interval_coverage_counts_ends_as_inside():
    assert interval_coverage([0, 0, 0, 0], [10, 10, 10, 10], [0, 10, 11, np.nan]) == pytest.approx(2 / 3)


def test_empirical_band_is_the_quantile_of_relative_errors():
    # Williams & Goodman (1971): band = F·(1 + empirical quantile of past relative errors);
    # oracle numpy.quantile (linear interpolation, Hyndman & Fan type 7).
    past = relative_errors(200, "1", 0.2, seed=1)
    forecast = pd.DataFrame({"item": ["KIT-A"], "lag_bucket": ["1"], "consensus": [250.0]})
    out = empirical_bands(forecast, past)
    rel = (past["actual"] - past["forecast"]) / past["forecast"]
    for level, pct in ((0.8, 80), (0.95, 95)):
        low, high = np.quantile(rel, [(1 - level) / 2, (1 + level) / 2])
        assert out[f"lower_{pct}"].iloc[0] == pytest.approx(250 * (1 + low))
        assert out[f"upper_{pct}"].iloc[0] == pytest.approx(250 * (1 + high))
    assert out["band_method"].iloc[0] == "empirical, 200 errors"


def test_short_history_uses_normal_from_mad():
    # For normal errors E|e| = σ·√(2/π), so σ ≈ 1.25·MAD (normal distribution fact).  With a large
    # sample but min_errors above it, the MAD band approaches F·(1 ± z·σ): z = 1.2816 (80%), 1.9600 (95%)
    # (scipy.stats.norm.ppf as the table of normal quantiles).
    past = relative_errors(20_000, "2-3", 0.1, seed=2)
    forecast = pd.DataFrame({"lag_bucket": ["2-3"], "consensus": [1000.0]})
    out = empirical_bands(forecast, past, min_errors=50_000)
    assert out["band_method"].iloc[0] == "normal from MAD, 20000 errors"
    for level, pct in ((0.8, 80), (0.95, 95)):
        z = stats.norm.ppf((1 + level) / 2)
        assert out[f"upper_{pct}"].iloc[0] == pytest.approx(1000 * (1 + z * 0.1), rel=0.005)
        assert out[f"lower_{pct}"].iloc[0] == pytest.approx(1000 * (1 - z * 0.1), rel=0.005)


def test_groups_are_kept_apart_and_empty_groups_borrow_the_pool():
    past = pd.concat([relative_errors(100, "1", 0.05, 3), relative_errors(100, "7+", 0.5, 4)], ignore_index=True)
    forecast = pd.DataFrame({"lag_bucket": ["1", "7+", "4-6"], "consensus": [100.0, 100.0, 100.0]})
    out = empirical_bands(forecast, past).set_index("lag_bucket")
    width = out["upper_80"] - out["lower_80"]
    assert width["7+"] > 5 * width["1"]
    assert out.loc["4-6", "band_method"] == "empirical, pooled, 200 errors"


def test_lag_bucket_is_derived_from_cycle_and_period():
    past = relative_errors(40, "2-3", 0.1, 5)
    forecast = pd.DataFrame({"cycle": ["2027-01"], "period": ["2027-03"], "consensus": [10.0]})
    out = empirical_bands(forecast, past)
    assert out["lag_bucket"].iloc[0] == "2-3" and out["band_method"].iloc[0] == "empirical, 40 errors"


def test_bands_are_checked():
    past = relative_errors(10, "1", 0.1, 6)
    forecast = pd.DataFrame({"lag_bucket": ["1"], "consensus": [10.0]})
    with pytest.raises(InvalidSpec):
        empirical_bands(forecast, past, levels=(0.8, 1.2))
    with pytest.raises(InvalidSpec):
        empirical_bands(forecast, past, by=("family",))
    with pytest.raises(InvalidSpec):
        winkler_score([1], [2], [1], level=0.0)


@settings(max_examples=25, deadline=None)
@given(errors=st.lists(st.tuples(st.floats(0.1, 1e4), st.floats(0, 1e4)), min_size=1, max_size=60),
       points=st.lists(st.floats(0, 1e5), min_size=1, max_size=10), min_errors=st.integers(1, 40))
def test_bands_hold_the_forecast_and_stay_nonnegative(errors, points, min_errors):
    past = pd.DataFrame(errors, columns=["forecast", "actual"]).assign(lag_bucket="1")
    forecast = pd.DataFrame({"lag_bucket": "1", "consensus": points})
    out = empirical_bands(forecast, past, min_errors=min_errors)
    tol = 1e-9 * (1 + out["consensus"])
    for pct in (80, 95):
        assert (out[f"lower_{pct}"] >= 0).all()
        assert (out[f"lower_{pct}"] <= out["consensus"] + tol).all()
        assert (out[f"upper_{pct}"] >= out["consensus"] - tol).all()
    # The wider level contains the narrower one (quantiles are monotone).
    assert (out["lower_95"] <= out["lower_80"] + tol).all() and (out["upper_95"] >= out["upper_80"] - tol).all()


def test_backtest_coverage_is_near_nominal_for_stable_errors():
    # With errors drawn from one fixed distribution, empirical quantiles are consistent, so
    # out-of-sample coverage approaches the nominal level (Williams & Goodman, 1971); we ask for the
    # planning target of 5 points.  Invented data, fixed seed.
    rng = np.random.default_rng(8)
    rows = []
    cycles = [f"2025-{m:02d}" for m in range(1, 13)] + [f"2026-{m:02d}" for m in range(1, 13)]
    for index, cycle in enumerate(cycles):
        for lag in range(1, 7):
            period_index = 2025 * 12 + index + lag
            period = f"{period_index // 12}-{period_index % 12 + 1:02d}"
            forecast = rng.uniform(50, 400, size=60)
            actual = forecast * np.exp(rng.normal(0, 0.1 + 0.04 * lag, size=60))  # lognormal, wider with lag
            rows.append(pd.DataFrame({"cycle": cycle, "period": period, "lag": lag, "forecast": forecast,
                                      "actual": actual}))
    errors = pd.concat(rows, ignore_index=True)
    result = backtest_bands(errors, first_test_cycle="2025-07").set_index("level")
    assert result.loc[0.8, "coverage"] == pytest.approx(0.8, abs=0.05)
    assert result.loc[0.95, "coverage"] == pytest.approx(0.95, abs=0.05)
    assert result.loc[0.8, "n_cycles"] == 18
    assert result.loc[0.8, "mean_winkler"] > 0


def test_backtest_uses_only_actuals_known_at_each_cycle():
    # A single earlier error known by the test cycle, and one not yet known (period after the cycle):
    # the band must come from the first only (1 error → normal from MAD).
    errors = pd.DataFrame({"cycle": ["2026-01", "2026-01", "2026-02"], "period": ["2026-02", "2026-05", "2026-03"],
                           "forecast": [100.0, 100.0, 100.0], "actual": [110.0, 500.0, 105.0]})
    result = backtest_bands(errors, levels=(0.8,), min_errors=30, first_test_cycle="2026-02")
    # MAD = 0.10 → σ = 0.1253, 80% band 100·(1 ± 1.2816·0.1253) = [83.9, 116.1] contains 105.
    assert result.loc[0, "coverage"] == 1.0
    assert result.loc[0, "mean_winkler"] == pytest.approx(2 * 100 * stats.norm.ppf(0.9) * 0.1 * np.sqrt(np.pi / 2))


# --- The size-class rule, bands at every level, scores by level -------------------------------------------

from consensus.methods.intervals import (  # noqa: E402
    backtest_bands_by_level, level_bands, level_errors, score_bands, score_bands_by_level, size_class_edges)


def heteroscedastic_errors(n, seed, *, sd_of):
    """Forecasts spread over two decades of size, actual = F + N(0, sd_of(F)²): the true law is known."""
    rng = np.random.default_rng(seed)
    forecast = np.exp(rng.uniform(np.log(50), np.log(5000), size=n))
    return pd.DataFrame({"lag_bucket": "1", "forecast": forecast,
                         "actual": forecast + rng.normal(0.0, 1.0, size=n) * sd_of(forecast)})


def coverage_by_size_class(banded, edges, pct):
    size_class = np.searchsorted(edges, banded["consensus"].to_numpy(), side="right")
    inside = (banded["actual"] >= banded[f"lower_{pct}"]) & (banded["actual"] <= banded[f"upper_{pct}"])
    return inside.groupby(size_class).agg(["mean", "size"])


def test_size_class_band_is_the_quantile_within_its_class():
    # Oracle numpy.quantile: the class edges are the 1/5 … 4/5 quantiles of the past positive forecasts, and a
    # forecast's band uses the relative errors of the past forecasts in its class only.
    past = heteroscedastic_errors(2000, 21, sd_of=lambda f: 3 * np.sqrt(f))
    edges = size_class_edges(past["forecast"], size_classes=5)
    np.testing.assert_allclose(edges, np.quantile(past["forecast"], [0.2, 0.4, 0.6, 0.8]))
    point = float(np.mean(edges[1:3]))  # inside class 3 of 5
    out = empirical_bands(pd.DataFrame({"lag_bucket": ["1"], "consensus": [point]}), past, rule="relative_by_size")
    members = past[(past["forecast"] > edges[1]) & (past["forecast"] <= edges[2])]
    rel = (members["actual"] - members["forecast"]) / members["forecast"]
    low, high = np.quantile(rel, [0.1, 0.9])
    assert out["lower_80"].iloc[0] == pytest.approx(point * (1 + low))
    assert out["upper_80"].iloc[0] == pytest.approx(point * (1 + high))
    assert out["band_method"].iloc[0] == f"empirical, {len(members)} errors, size class 3 of 5"


def test_relative_rule_miscovers_by_size_and_size_classes_fix_it():
    # Known law: normal errors with sd = 3·√F (a Poisson-like count, variance ∝ level; common practice for
    # demand).  Then sd(e/F) = 3/√F falls with size, so one pooled relative band is too narrow for small
    # forecasts and too wide for large ones although it covers 80 % on average.  Within size classes the
    # empirical quantile is consistent for each class (Mondrian calibration, Vovk et al. 2005, from memory):
    # each class covers 80 % up to sampling error, here 4,000 test cells a class: SE = √(0.8·0.2/4000) = 0.63
    # points; we allow 3 points for that and the quantiles' own estimation error.  Invented data, fixed seed.
    law = lambda f: 3 * np.sqrt(f)  # noqa: E731
    past = heteroscedastic_errors(20_000, 22, sd_of=law)
    new = heteroscedastic_errors(20_000, 23, sd_of=law).rename(columns={"forecast": "consensus"})
    edges = size_class_edges(past["forecast"], size_classes=5)
    pooled = empirical_bands(new, past, rule="relative")
    by_size = empirical_bands(new, past, rule="relative_by_size")
    for pct, nominal in ((80, 0.8), (95, 0.95)):
        pooled_cover = coverage_by_size_class(pooled, edges, pct)["mean"]
        assert pooled_cover.iloc[0] < nominal - 0.08 and pooled_cover.iloc[-1] > nominal + 0.03
        assert interval_coverage(pooled[f"lower_{pct}"], pooled[f"upper_{pct}"], pooled["actual"]) == \
            pytest.approx(nominal, abs=0.02)
        classes = coverage_by_size_class(by_size, edges, pct)
        assert (classes["size"] > 3500).all()
        assert np.abs(classes["mean"] - nominal).max() < 0.03
    # The calibrated band is also the better band by the interval score (Gneiting & Raftery 2007: a proper
    # score, lower is better).
    for pct, level in ((80, 0.8), (95, 0.95)):
        score = {name: np.mean(winkler_score(b[f"lower_{pct}"], b[f"upper_{pct}"], b["actual"], level=level))
                 for name, b in (("pooled", pooled), ("by_size", by_size))}
        assert score["by_size"] < score["pooled"]


def test_both_rules_cover_nominal_when_relative_errors_are_alike():
    # Normal relative errors, sd(e/F) = 0.2 at every size: the pooled rule is already right, and the size
    # classes must not spoil it (Williams & Goodman 1971; sampling error as above).
    law = lambda f: 0.2 * f  # noqa: E731
    past = heteroscedastic_errors(20_000, 24, sd_of=law)
    new = heteroscedastic_errors(20_000, 25, sd_of=law).rename(columns={"forecast": "consensus"})
    for rule in ("relative", "relative_by_size"):
        out = empirical_bands(new, past, rule=rule)
        for pct, nominal in ((80, 0.8), (95, 0.95)):
            assert interval_coverage(out[f"lower_{pct}"], out[f"upper_{pct}"], out["actual"]) == \
                pytest.approx(nominal, abs=0.015)


ITEMS = pd.DataFrame({"item": ["A1", "A2", "B1"], "family": ["FA", "FA", "FB"]})


def test_level_errors_sum_cells_before_the_error():
    # Hand example: FA's two items miss by +5 and −5 in 2026-02 at cycle 2026-01, so the family's own error
    # is 0; FB's one item misses by +2.  Total: forecast 10 + 20 + 8 = 38, actual 15 + 15 + 10 = 40, error 2.
    errors = pd.DataFrame({"source": "consensus", "cycle": "2026-01", "period": "2026-02",
                           "item": ["A1", "A2", "B1"], "location": "L1",
                           "forecast": [10.0, 20.0, 8.0], "actual": [15.0, 15.0, 10.0]})
    family = level_errors(errors, level="family", items=ITEMS).set_index("family")
    assert family.loc["FA", "forecast"] == 30 and family.loc["FA", "error"] == 0 and family.loc["FA", "n_cells"] == 2
    assert family.loc["FB", "error"] == 2 and family.loc["FB", "lag_bucket"] == "1"
    total = level_errors(errors, level="total").iloc[0]
    assert (total["forecast"], total["actual"], total["error"]) == (38.0, 40.0, 2.0)


def correlated_family_errors(*, n_families, n_items, cycles, lags_, common_sd, item_sd, seed):
    """Cell errors with a shock common to each family and cycle: e = F·(common + own), all normal.

    Every item of a family has the same forecast in a cycle, so the family's relative error is
    common + mean(own), normal with sd √(common_sd² + item_sd²/n_items): the true family law is known.
    """
    rng = np.random.default_rng(seed)
    rows = []
    base = 2024 * 12
    for c in range(cycles):
        for lag in lags_:
            level = rng.uniform(50, 150, size=n_families)
            shock = rng.normal(0, common_sd, size=n_families)
            own = rng.normal(0, item_sd, size=(n_families, n_items))
            forecast = np.repeat(level, n_items)
            actual = forecast * (1 + np.repeat(shock, n_items) + own.ravel())
            rows.append(pd.DataFrame({
                "source": "consensus", "cycle": f"{(base + c) // 12}-{(base + c) % 12 + 1:02d}",
                "period": f"{(base + c + lag) // 12}-{(base + c + lag) % 12 + 1:02d}",
                "item": [f"F{f:02d}-I{i}" for f in range(n_families) for i in range(n_items)],
                "location": "L1", "forecast": forecast, "actual": actual}))
    errors = pd.concat(rows, ignore_index=True)
    items = pd.DataFrame({"item": errors["item"].unique()}).assign(family=lambda d: d["item"].str[:3])
    return errors, items


def test_family_bands_from_family_errors_carry_the_correlation():
    # Items of a family share a shock (sd 0.10) besides their own error (sd 0.15), so the family's relative
    # error has sd √(0.10² + 0.15²/8) = 0.1146, not the √(0.10² + 0.15²)/√8 ≈ 0.064 that independence implies.
    # The family band from the family's own errors must match the normal law (oracle scipy.stats.norm.ppf)
    # and cover nominal; the independence sum √Σ(item deviation²) must not.  Invented data, fixed seed.
    common, own, n_items = 0.10, 0.15, 8
    past, items = correlated_family_errors(n_families=40, n_items=n_items, cycles=100, lags_=(1,), common_sd=common,
                                           item_sd=own, seed=31)
    new, _ = correlated_family_errors(n_families=40, n_items=n_items, cycles=100, lags_=(1,), common_sd=common,
                                      item_sd=own, seed=32)
    consensus = new.rename(columns={"forecast": "consensus"})
    family = level_bands(consensus, past, level="family", items=items)
    true_sd = np.sqrt(common**2 + own**2 / n_items)
    for pct, level in ((80, 0.8), (95, 0.95)):
        z = stats.norm.ppf((1 + level) / 2)
        half = (family[f"upper_{pct}"] - family[f"lower_{pct}"]) / (2 * family["consensus"])
        assert half.mean() == pytest.approx(z * true_sd, rel=0.05)
    observed = level_errors(new, level="family", items=items)[["cycle", "period", "family", "actual"]]
    scored = family.merge(observed, on=["cycle", "period", "family"])
    assert len(scored) == 4000
    cells = empirical_bands(consensus, past)
    dev = cells.assign(family=cells["item"].str[:3], lo=(cells["consensus"] - cells["lower_80"]) ** 2,
                       hi=(cells["upper_80"] - cells["consensus"]) ** 2)
    independent = dev.groupby(["cycle", "period", "family"], as_index=False)[["consensus", "lo", "hi", "actual"]].sum()
    for pct, nominal in ((80, 0.8), (95, 0.95)):
        assert interval_coverage(scored[f"lower_{pct}"], scored[f"upper_{pct}"], scored["actual"]) == \
            pytest.approx(nominal, abs=0.025)
    assert interval_coverage(independent["consensus"] - np.sqrt(independent["lo"]),
                             independent["consensus"] + np.sqrt(independent["hi"]), independent["actual"]) < 0.65


def test_score_bands_by_hand():
    # Family FA (items A1, A2), bands stored for two months at lag 1 and one at lag 2.
    # 2026-02: actual 15 + 15 = 30 in [25, 35] → covered, Winkler 80 % = 10.
    # 2026-03: A1 15, A2 no row (known item, month with actuals → 0), actual 15 < 20 → missed,
    #          Winkler = (30 − 20) + (2/0.2)·(20 − 15) = 60.
    # 2026-04 (lag 2): actual 40 in [30, 50] → covered, Winkler 20.   2026-05 has no actuals: not scored.
    actuals = pd.DataFrame({"item": ["A1", "A2", "A1", "A1", "A2", "B1"], "location": "L1",
                            "period": ["2026-02", "2026-02", "2026-03", "2026-04", "2026-04", "2026-03"],
                            "quantity": [15.0, 15.0, 15.0, 20.0, 20.0, 3.0]})
    bands = pd.DataFrame({"cycle": ["2026-01", "2026-02", "2026-02", "2026-02"], "family": "FA",
                          "period": ["2026-02", "2026-03", "2026-04", "2026-05"],
                          "lower_80": [25.0, 20.0, 30.0, 1.0], "upper_80": [35.0, 30.0, 50.0, 2.0]})
    table = score_bands(bands, actuals, level="family", items=ITEMS, levels=(0.8,)).set_index("lag_bucket")
    assert table.loc["1", "n"] == 2 and table.loc["1", "coverage"] == 0.5
    assert table.loc["1", "mean_winkler"] == pytest.approx((10 + 60) / 2)
    assert table.loc["2-3", "coverage"] == 1.0 and table.loc["2-3", "mean_winkler"] == pytest.approx(20)
    assert table.loc["all", "n"] == 3 and table.loc["all", "coverage"] == pytest.approx(2 / 3)
    assert table.loc["all", "coverage_gap"] == pytest.approx(2 / 3 - 0.8) and table.loc["all", "n_cycles"] == 2
    both = score_bands_by_level({"family": bands, "total": bands.drop(columns="family")}, actuals, items=ITEMS,
                                levels=(0.8,))
    total = both[(both["level"] == "total") & (both["lag_bucket"] == "1")].iloc[0]
    # Total 2026-03 adds B1's 3: 18 < 20, still missed; Winkler (30 − 20) + 10·2 = 30.
    assert total["coverage"] == 0.5 and total["mean_winkler"] == pytest.approx((10 + 30) / 2)


@pytest.mark.slow
def test_backtest_by_level_holds_nominal_at_every_level():
    # Stable, correlated errors (as above) over 60 cycles and lags 1-3: a rolling origin reading each level's
    # bands off its own past errors covers within the planning target of 5 points at item × location, family
    # and total (Williams & Goodman 1971: empirical quantiles of a stable law are consistent).
    errors, items = correlated_family_errors(n_families=12, n_items=4, cycles=60, lags_=(1, 2, 3),
                                             common_sd=0.08, item_sd=0.12, seed=41)
    table = backtest_bands_by_level(errors, items=items, first_test_cycle="2024-07")
    overall = table[table["lag_bucket"] == "all"].set_index(["level", "nominal"])
    assert set(overall.index.get_level_values("level")) == {"item", "family", "total"}
    for (level, nominal), row in overall.iterrows():
        assert row["coverage"] == pytest.approx(nominal, abs=0.05), (level, nominal)
    assert overall.loc[("total", 0.8), "n"] == 54 * 3 and overall.loc[("item", 0.8), "n_cycles"] == 54
    by_lag = table[(table["level"] == "family") & (table["nominal"] == 0.8)]
    assert list(by_lag["lag_bucket"]) == ["1", "2-3", "all"]


def test_level_options_are_checked():
    errors = pd.DataFrame({"cycle": ["2026-01"], "period": ["2026-02"], "item": ["A1"], "location": ["L1"],
                           "forecast": [1.0], "actual": [1.0]})
    with pytest.raises(InvalidSpec):
        level_errors(errors, level="galaxy")
    with pytest.raises(InvalidSpec):
        level_errors(errors, level="family")  # no items master
    with pytest.raises(InvalidSpec):
        empirical_bands(pd.DataFrame({"lag_bucket": ["1"], "consensus": [1.0]}),
                        errors.assign(lag_bucket="1"), rule="widest")
    with pytest.raises(InvalidSpec):
        backtest_bands_by_level(errors, size_classes=0)


def test_student_t_widens_bands_from_few_errors_to_nominal():
    # Known law: 20,000 groups, each with 5 past errors N(0, 10²) about a known centre 0 and one new error.
    # A new error over σ̂ estimated from n errors is Student-t with n degrees of freedom (common statistical
    # fact; oracle scipy.stats.t inside the method), so the z band under-covers and the t band covers nominal;
    # σ̂ from the MAD makes t approximate, hence 2.5 points.  Invented data, fixed seed.
    rng = np.random.default_rng(51)
    groups, n = 20_000, 5
    past = pd.DataFrame({"g": np.repeat(np.arange(groups), n), "forecast": 100.0})
    past["actual"] = 100 + rng.normal(0, 10, len(past))
    new = pd.DataFrame({"g": np.arange(groups), "consensus": 100.0, "actual": 100 + rng.normal(0, 10, groups)})
    normal = empirical_bands(new, past, by=("g",))
    student = empirical_bands(new, past, by=("g",), few_errors="student_t")
    assert student["band_method"].iloc[0] == "Student t from MAD, 5 errors"
    for pct, nominal in ((80, 0.8), (95, 0.95)):
        assert interval_coverage(normal[f"lower_{pct}"], normal[f"upper_{pct}"], normal["actual"]) < nominal - 0.03
        assert interval_coverage(student[f"lower_{pct}"], student[f"upper_{pct}"], student["actual"]) == \
            pytest.approx(nominal, abs=0.025)
    # Half-width ratio t/z for 5 degrees of freedom at 80 %: t_{0.9,5} / z_{0.9} = 1.4759 / 1.2816.
    ratio = (student["upper_80"] - 100) / (normal["upper_80"] - 100)
    np.testing.assert_allclose(ratio, stats.t.ppf(0.9, 5) / stats.norm.ppf(0.9))


def test_size_classes_shrink_to_what_the_errors_afford():
    # 100 errors in one lag bucket with min_errors 30 afford 100 // 30 = 3 classes; 40 errors afford one,
    # which is the relative rule itself.
    past = heteroscedastic_errors(100, 52, sd_of=lambda f: 3 * np.sqrt(f))
    forecast = pd.DataFrame({"lag_bucket": "1", "consensus": [60.0, 4000.0]})
    out = empirical_bands(forecast, past, rule="relative_by_size")
    assert out["band_method"].iloc[0].endswith(", size class 1 of 3")
    assert out["band_method"].iloc[1].endswith(", size class 3 of 3")
    few = past.iloc[:40]
    np.testing.assert_allclose(empirical_bands(forecast, few, rule="relative_by_size")[["lower_80", "upper_80"]],
                               empirical_bands(forecast, few)[["lower_80", "upper_80"]])


def test_an_empty_lag_bucket_borrows_its_size_class_first():
    # Lag bucket "7+" has no past errors: under the size rule it takes its size class's errors over every
    # lag (oracle numpy.quantile of that class), not the pool of all sizes.
    past = heteroscedastic_errors(3000, 53, sd_of=lambda f: 3 * np.sqrt(f))
    edges = size_class_edges(past["forecast"], size_classes=5)
    point = float(edges[-1] * 1.5)  # the largest class
    out = empirical_bands(pd.DataFrame({"lag_bucket": ["7+"], "consensus": [point]}), past, rule="relative_by_size")
    members = past[past["forecast"] > edges[-1]]
    rel = (members["actual"] - members["forecast"]) / members["forecast"]
    assert out["upper_80"].iloc[0] == pytest.approx(point * (1 + np.quantile(rel, 0.9)))
    assert out["band_method"].iloc[0] == f"empirical, pooled, {len(members)} errors, size class 5 of 5"


@settings(max_examples=20, deadline=None)
@given(errors=st.lists(st.tuples(st.floats(0.1, 1e4), st.floats(0, 1e4), st.sampled_from(["1", "2-3", "7+"])),
                       min_size=1, max_size=80),
       points=st.lists(st.tuples(st.floats(0, 1e5), st.sampled_from(["1", "2-3", "4-6"])), min_size=1, max_size=10),
       min_errors=st.integers(1, 40), size_classes=st.integers(1, 6),
       few_errors=st.sampled_from(["normal", "student_t"]))
def test_size_rule_bands_hold_the_forecast_and_nest(errors, points, min_errors, size_classes, few_errors):
    # Invariants of any band (common practice): it holds the point, stays ≥ 0, and the 95 % band holds the
    # 80 % band (quantiles and t/z factors are monotone in the level).
    past = pd.DataFrame(errors, columns=["forecast", "actual", "lag_bucket"])
    forecast = pd.DataFrame(points, columns=["consensus", "lag_bucket"])
    out = empirical_bands(forecast, past, min_errors=min_errors, rule="relative_by_size", size_classes=size_classes,
                          few_errors=few_errors)
    tol = 1e-9 * (1 + out["consensus"])
    assert len(out) == len(forecast) and out["band_method"].notna().all()
    for pct in (80, 95):
        assert (out[f"lower_{pct}"] >= 0).all()
        assert (out[f"lower_{pct}"] <= out["consensus"] + tol).all()
        assert (out[f"upper_{pct}"] >= out["consensus"] - tol).all()
    assert (out["lower_95"] <= out["lower_80"] + tol).all() and (out["upper_95"] >= out["upper_80"] - tol).all()


# --- What the stored family and total bands read: the published plans' own errors first -------------------

from consensus.methods.intervals import (  # noqa: E402
    MIN_OWN_BAND_ERRORS, level_band_errors, own_errors_first, published_level_errors, stored_level_bands)


def test_own_errors_first_pools_a_stand_in_only_while_the_own_record_is_short():
    # The rule (common practice: borrow the nearest comparable record rather than band from a handful of
    # errors): 29 own errors are pooled with the stand-in's, 30 are used alone.
    own = pd.DataFrame({"forecast": np.ones(MIN_OWN_BAND_ERRORS), "actual": 1.0})
    stand_in = pd.DataFrame({"forecast": np.ones(50), "actual": 2.0})
    errors, basis = own_errors_first(own.iloc[:-1], stand_in)
    assert basis == "pooled" and len(errors) == MIN_OWN_BAND_ERRORS - 1 + 50
    errors, basis = own_errors_first(own, stand_in)
    assert basis == "own" and len(errors) == MIN_OWN_BAND_ERRORS and (errors["actual"] == 1.0).all()
    assert own_errors_first(None, stand_in)[1] == "fallback"
    assert own_errors_first(own.iloc[:0], None) == (None, "none")


def plan_and_sales_nodes(n_cycles, *, plan_sd, sales_bias, seed):
    """Two families a month: the published plan unbiased (sd ``plan_sd``), sales ``sales_bias`` high. Invented."""
    rng = np.random.default_rng(seed)
    cycles = [f"20{24 + (m // 12)}-{m % 12 + 1:02d}" for m in range(n_cycles)]
    rows = []
    for c, cycle in enumerate(cycles):
        period = cycles[c + 1] if c + 1 < n_cycles else "2099-01"
        for family in ("F1", "F2"):
            actual = 1000.0 + 200 * rng.random()
            rows.append({"source": "consensus", "forecast": actual / (1 + rng.normal(0, plan_sd))})
            rows.append({"source": "sales", "forecast": actual * (1 + sales_bias)})
            rows[-2].update(cycle=cycle, node_item=family, period=period, actual=actual)
            rows[-1].update(cycle=cycle, node_item=family, period=period, actual=actual)
    nodes = pd.DataFrame(rows).assign(level="family", node_location="all", lag=1)
    totals = nodes.groupby(["source", "cycle", "period", "lag"], as_index=False)[["forecast", "actual"]].sum()
    return pd.concat([nodes, totals.assign(level="total", node_item="all", node_location="all")], ignore_index=True)


def test_level_bands_read_the_published_plans_errors_not_a_biased_stand_in():
    # The total's band must come from the errors the published total plans made (oracle: numpy's quantile of
    # their relative errors, Williams & Goodman 1971), not from a combination that replays a source 10 % high
    # at full weight, which would shift the band and, through the MAD, widen it.  Invented data, fixed seed.
    nodes = plan_and_sales_nodes(80, plan_sd=0.03, sales_bias=0.10, seed=5)
    weights = pd.DataFrame({"segment": ["F1", "F2"], "lag_bucket": "1", "source": "sales", "weight": 1.0})
    record = level_band_errors(nodes, weights)
    assert {level: basis for level, (_, basis) in record.items()} == {"family": "own", "total": "own"}
    total = nodes[(nodes["level"] == "total") & (nodes["source"] == "consensus")]
    pd.testing.assert_frame_equal(published_level_errors(nodes)["total"][["forecast", "actual"]],
                                  total[["forecast", "actual"]].reset_index(drop=True))
    items = pd.DataFrame({"item": ["A", "B"], "family": ["F1", "F2"]})
    cells = pd.DataFrame({"item": ["A", "B"], "location": "L", "period": "2026-06", "consensus": [400.0, 600.0]})
    out = stored_level_bands(cells, {level: errors for level, (errors, _) in record.items()}, items=items,
                             cycle="2026-05", levels=(0.8,), basis={level: b for level, (_, b) in record.items()})
    band = out[out["level"] == "total"].iloc[0]
    relative = (total["actual"] - total["forecast"]) / total["forecast"]
    assert band["lower_80"] == pytest.approx(1000 * (1 + np.quantile(relative, 0.1)))
    assert band["upper_80"] == pytest.approx(1000 * (1 + np.quantile(relative, 0.9)))
    assert band["band_method"].startswith("total plans' own errors: empirical, 80 errors")


def test_a_short_published_record_is_pooled_with_the_combinations_errors():
    # 10 published cycles (20 family errors, 10 total errors) are fewer than MIN_OWN_BAND_ERRORS: the
    # combination's errors of the same months are pooled in, so the band has twice the errors (hand count).
    nodes = plan_and_sales_nodes(11, plan_sd=0.03, sales_bias=0.10, seed=6)
    nodes = nodes[nodes["cycle"] < nodes["cycle"].max()]  # the newest cycle's month is not known yet
    weights = pd.DataFrame({"segment": ["F1", "F2"], "lag_bucket": "1", "source": "sales", "weight": 1.0})
    record = level_band_errors(nodes, weights)
    assert record["family"][1] == "pooled" and len(record["family"][0]) == 2 * 20
    assert record["total"][1] == "pooled" and len(record["total"][0]) == 2 * 10
    # Without weights (a run weighing other segments than families) the published errors stand alone.
    assert level_band_errors(nodes, None)["total"][1] == "own"
