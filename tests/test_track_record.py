"""A submitter's track record: pooled from the scorecard's rows, worded plainly, printed as the scorecard has it."""

from __future__ import annotations

import shutil

import numpy as np
import openpyxl
import pandas as pd
import pytest
from sklearn.metrics import mean_absolute_error

from consensus.methods.track_record import describe_bucket, explain_weights, pool_groups
from consensus.resources import sample_inputs_dir


def _group_rows(errors: pd.DataFrame) -> pd.DataFrame:
    """Scorecard-shaped rows per group and lag bucket, from the errors themselves (definitions: common practice)."""
    rows = []
    for (group, bucket), g in errors.groupby(["group", "lag_bucket"]):
        e = g["actual"] - g["forecast"]
        mad = e.abs().mean()
        rows.append({"node_item": group, "lag_bucket": bucket, "n": len(g), "mad": mad, "bias": e.mean(),
                     "wape": 100 * e.abs().sum() / g["actual"].sum(), "bias_pct": 100 * e.sum() / g["actual"].sum(),
                     "tracking_signal": e.sum() / mad})
    return pd.DataFrame(rows)


def test_pooled_wape_and_bias_are_those_of_all_the_forecasts_together():
    """Oracle: scikit-learn's mean_absolute_error over every forecast of the groups, WAPE = MAE / mean actual."""
    rng = np.random.default_rng(7)
    size = 400
    errors = pd.DataFrame({"group": rng.choice(["A", "B", "C", "D"], size),
                           "lag_bucket": rng.choice(["1", "2-3", "4-6", "7+"], size),
                           "actual": rng.gamma(4.0, 50.0, size)})
    errors["forecast"] = errors["actual"] * rng.normal(1.1, 0.2, size)
    pooled = pool_groups(_group_rows(errors)).set_index("lag_bucket")
    for bucket, g in errors.groupby("lag_bucket"):
        wape = 100 * mean_absolute_error(g["actual"], g["forecast"]) / g["actual"].mean()
        bias = 100 * (g["actual"] - g["forecast"]).sum() / g["actual"].sum()
        assert pooled.loc[bucket, "wape"] == pytest.approx(wape, rel=1e-12)
        assert pooled.loc[bucket, "bias_pct"] == pytest.approx(bias, rel=1e-12)
        assert pooled.loc[bucket, "n"] == len(g) and pooled.loc[bucket, "n_groups"] == g["group"].nunique()
    rows = _group_rows(errors)
    assert pooled["tracking_signal"].to_dict() == pytest.approx(
        rows.groupby("lag_bucket")["tracking_signal"].mean().to_dict())  # the mean of the groups' signals


def test_a_group_forecast_exactly_adds_no_error_and_is_counted_apart():
    rows = pd.DataFrame({"lag_bucket": ["1", "1"], "n": [3, 3], "mad": [0.0, 10.0], "bias": [0.0, -10.0],
                         "wape": [0.0, 10.0], "bias_pct": [0.0, -10.0], "tracking_signal": [0.0, -3.0]})
    pooled = pool_groups(rows).iloc[0]
    assert pooled["n_unrecovered"] == 1 and pooled["wape"] == pytest.approx(10.0)


def test_stored_orders_count_a_group_forecast_exactly_in_the_denominator():
    """With the scorecard's Σ orders stored, the exact group's 30 units of orders count: WAPE = 30 / (30 + 300)."""
    rows = pd.DataFrame({"lag_bucket": ["1", "1"], "n": [3, 3], "mad": [0.0, 10.0], "bias": [0.0, -10.0],
                         "wape": [0.0, 10.0], "bias_pct": [0.0, -10.0], "tracking_signal": [0.0, -3.0],
                         "sum_actual": [30.0, 300.0]})
    pooled = pool_groups(rows).iloc[0]
    assert pooled["n_unrecovered"] == 0 and pooled["wape"] == pytest.approx(100 * 30 / 330)
    assert pooled["bias_pct"] == pytest.approx(100 * -30 / 330)


@pytest.mark.parametrize("bias, words", [(-12.4, "ran 12% high on average"), (7.6, "ran 8% low on average"),
                                         (0.3, "were about right on average")])
def test_the_sentence_says_high_for_a_negative_bias(bias, words):
    text = describe_bucket("2-3", wape=15.2, bias_pct=bias, tracking_signal=-2.0, n=21)
    assert text == (f"Your forecasts 2–3 months ahead {words} against what customers ordered; month by month they "
                    "missed by 15% of the orders (WAPE, 21 forecasts).")


def test_a_tracking_signal_beyond_four_reads_as_a_steady_lean():
    """|TS| > 4: the limit of Brown (1959), the one the scorecard flags."""
    text = describe_bucket("1", wape=10.0, bias_pct=-9.0, tracking_signal=-5.2, n=12)
    assert text.endswith("The misses kept falling above the orders (tracking signal −5.2, beyond ±4): a steady "
                         "lean, not bad luck.")
    assert "steady lean" not in describe_bucket("1", wape=10.0, bias_pct=-9.0, tracking_signal=-3.9, n=12)
    assert describe_bucket("7+", wape=float("nan"), bias_pct=float("nan"), tracking_signal=0.0, n=0) == \
        "None of your forecasts 7 or more months ahead has been compared with orders yet."


def test_the_weight_is_explained_by_the_errors_it_follows():
    weights = pd.DataFrame({"segment": ["F"] * 3, "lag_bucket": ["1"] * 3, "source": ["statistical", "sales", "dc"],
                            "weight": [0.3, 0.45, 0.25], "mse": [500.0, 300.0, 700.0], "mad": [20.0, 15.0, 25.0],
                            "psi": [0.9] * 3, "n_cycles": [10] * 3, "basis": ["segment"] * 3, "note": ["n"] * 3})
    row = explain_weights(weights, source="sales", segments=["F"], scheme="shrunk_mse").iloc[0]
    assert row["n_sources"] == 3 and row["equal_share"] == pytest.approx(1 / 3)
    assert row["why"] == ("More than an equal share, because your past errors were smaller. Each source counts in "
                          "inverse proportion to its past mean squared error: yours 300, Statistical 500, "
                          "Distribution centers 700; then pulled toward equal weights by ψ = 0.90 (10 cycles of "
                          "history).")
    assert explain_weights(weights, source="sales", segments=["G"], scheme="shrunk_mse").empty


# ---- the sample company ------------------------------------------------------------------------------


def _track_record_tables(path) -> dict[str, pd.DataFrame]:
    """The tables of the track-record sheet, each under its header row, as openpyxl reads the cells."""
    sheet = openpyxl.load_workbook(path)["Your track record"]
    rows = [list(r) for r in sheet.iter_rows(values_only=True)]
    tables, at = {}, 0
    while at < len(rows):
        first = rows[at][0]
        if first in ("How far ahead", "Product", "Segment"):
            width = max(i for i, v in enumerate(rows[at]) if v is not None) + 1
            end = at + 1
            while end < len(rows) and rows[end][0] is not None:
                end += 1
            tables[first] = pd.DataFrame([r[:width] for r in rows[at + 1:end]], columns=rows[at][:width])
            at = end
        at += 1
    return tables


@pytest.mark.slow  # the demo store
def test_the_track_record_of_a_sales_lead_matches_the_scorecard(demo_url, tmp_path):
    from consensus.store.db import session_scope
    from consensus.workflow.inputs import run_parts
    from consensus.workflow.publish import latest_run
    from consensus.workflow.scorecard import scorecard
    from consensus.workflow.templates import make_template

    path = make_template("2026-11", source="sales", out=tmp_path / "north.xlsx", grain="family,region",
                         region="NORTH", url=demo_url).path
    tables = _track_record_tables(path)
    card = scorecard("2026-11", level="family_region", url=demo_url)
    mine = card[(card["source"] == "sales") & (card["node_location"] == "NORTH")].sort_values(
        ["node_item", "lag_bucket"], ignore_index=True)
    groups = tables["Product"]
    assert len(groups) == len(mine) == 4 * 4  # four families × four lag buckets
    assert groups["Product"].tolist() == mine["node_item"].tolist()
    assert groups["Lag bucket"].tolist() == mine["lag_bucket"].tolist()
    assert groups["Forecasts scored"].tolist() == mine["n"].tolist()
    for sheet_column, card_column in (("WAPE %", "wape"), ("Bias %", "bias_pct"), ("Tracking signal",
                                                                                    "tracking_signal")):
        assert groups[sheet_column].astype(float).tolist() == pytest.approx(mine[card_column].tolist(), rel=1e-12)

    pooled = tables["How far ahead"].set_index("Lag bucket")
    expected = pool_groups(mine).set_index("lag_bucket")
    assert pooled["WAPE %"].astype(float).to_dict() == pytest.approx(expected["wape"].to_dict(), rel=1e-12)
    assert pooled["Bias %"].astype(float).to_dict() == pytest.approx(expected["bias_pct"].to_dict(), rel=1e-12)
    for bucket, row in pooled.iterrows():
        side = "high" if row["Bias %"] < 0 else "low"
        assert f"ran {abs(row['Bias %']):.0f}% {side} on average" in row["In plain words"]

    with session_scope(demo_url, write=False) as session:
        weights = run_parts(session, latest_run(session, "2026-11"), ["weights"])["weights"]
    sales = weights[weights["source"] == "sales"].sort_values(["segment", "lag_bucket"], ignore_index=True)
    shown = tables["Segment"]
    assert shown["Segment"].tolist() == sales["segment"].tolist()
    assert shown["Your weight"].astype(float).tolist() == pytest.approx(sales["weight"].tolist(), rel=1e-12)
    assert shown["The run's note"].tolist() == sales["note"].tolist()


def _family_region(frame: pd.DataFrame, value: str) -> pd.DataFrame:
    """Sum item × location rows of the sample company to family × region with its own master files (pandas)."""
    master = sample_inputs_dir() / "master"
    items = pd.read_csv(master / "items.csv")[["item", "family"]]
    locations = pd.read_csv(master / "locations.csv")[["location", "region"]]
    joined = frame.merge(items, on="item").merge(locations, on="location")
    return joined.groupby(["family", "region", "period"])[value].sum()


@pytest.mark.slow  # the demo store
def test_the_references_of_the_next_cycle_are_the_orders_and_the_published_plan(demo_dir, tmp_path):
    """Oracles: the sample company's order file and the consensus CSV the demo exported, summed with pandas."""
    from consensus.store.db import get_engine
    from consensus.workflow.cycles import open_cycle
    from consensus.workflow.templates import make_template

    copy = tmp_path / "store.db"
    shutil.copy(demo_dir / "consensus.db", copy)
    url = f"sqlite:///{copy}"
    get_engine.cache_clear()
    open_cycle("2026-12", horizon=18, url=url, allow_missing_history=True)
    path = make_template("2026-12", source="sales", out=tmp_path / "north.csv", grain="family,region",
                         region="NORTH", url=url).path
    frame = pd.read_csv(path, encoding="utf-8-sig")
    orders = pd.read_csv(sample_inputs_dir() / "history" / "orders.csv")
    orders["period"] = orders["date"].str[:7]
    by_month = _family_region(orders, "quantity")
    published = _family_region(pd.read_csv(demo_dir / "consensus.csv"), "consensus")

    kinds = frame["line"].str.split(" \\(").str[0]
    recent = frame[kinds == "Reference: orders"].set_index("family")
    for month in [c for c in frame.columns if c[:2] == "20" and "2026-01" <= c <= "2026-11"]:
        for family, value in recent[month].items():
            assert value == round(by_month[(family, "NORTH", month)]), (family, month)
    a_year_on = frame[kinds == "Reference: orders a year earlier"].set_index("family")
    assert a_year_on.loc["DRIP-KITS", "2027-01"] == round(by_month[("DRIP-KITS", "NORTH", "2026-01")])
    last = frame[kinds == "Reference: last consensus"].set_index("family")
    assert frame.loc[kinds == "Reference: last consensus", "line"].iloc[0] == \
        "Reference: last consensus (cycle 2026-11, published)"
    for month in ("2027-01", "2027-06", "2028-05"):
        for family, value in last[month].items():
            assert value == pytest.approx(published[(family, "NORTH", month)], abs=0.5), (family, month)
    statistical = frame[kinds == "Reference: statistical forecast"]
    assert statistical["line"].iloc[0] == "Reference: statistical forecast (not yet computed)"
    assert statistical.filter(regex=r"^20").isna().all().all()

    computed = make_template("2026-12", source="sales", out=tmp_path / "north_stat.csv", grain="family,region",
                             region="NORTH", statistical="compute", url=url).path
    frame = pd.read_csv(computed, encoding="utf-8-sig")
    statistical = frame[frame["line"].str.startswith("Reference: statistical forecast")]
    assert statistical["line"].iloc[0] == "Reference: statistical forecast (computed for this template)"
    horizon = [c for c in frame.columns if c[:2] == "20" and c >= "2027-01"]
    assert (statistical[horizon] > 0).all().all() and len(statistical) == 4
    get_engine.cache_clear()
