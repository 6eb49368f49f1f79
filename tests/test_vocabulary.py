"""One vocabulary: every closed set of the code has a label, and the pack prints only registry labels.

The pack checks render the HTML (no PDF) of the invented example and of inputs
shaped as the store gathers them today (raw ids in notes, levels, scopes and
weight bases), then read every visible text and every table column that
names a source, state, level, exception kind or method.
"""

from __future__ import annotations

import dataclasses
import math
import re
from html.parser import HTMLParser

import numpy as np
import pandas as pd
import pytest
from hypothesis import given
from hypothesis import strategies as st

from consensus import vocabulary
from consensus.pack.charts import TONE_COLOURS
from consensus.pack.context import MIN_HISTORY_CYCLES, build_pack_context
from consensus.pack.inputs import example_pack_inputs
from consensus.pack.render import build_html
from consensus.resources import reports_dir

REGISTRIES = {
    "levels": vocabulary.LEVELS, "submission states": vocabulary.SUBMISSION_STATES,
    "plan states": vocabulary.PLAN_STATES, "demand patterns": vocabulary.DEMAND_PATTERNS,
    "statistical methods": vocabulary.STATISTICAL_METHODS, "weight schemes": vocabulary.WEIGHT_SCHEMES,
    "weight bases": vocabulary.WEIGHT_BASES, "weight segments": vocabulary.WEIGHT_SEGMENTS,
    "reconciliation methods": vocabulary.RECONCILIATION_METHODS, "band methods": vocabulary.BAND_METHODS,
    "decision kinds": vocabulary.DECISION_KINDS, "measures": vocabulary.MEASURES,
    "pattern groups": vocabulary.PATTERN_GROUPS, "amplification states": vocabulary.AMPLIFICATION_STATES,
}


# --------------------------------------------------------------------------- the registries cover the code


def _keys(registry) -> set[str]:
    return {t.key for t in registry}


def test_every_closed_set_of_the_code_has_a_label():
    # The code's own closed sets are the oracle: a new method, level or state without a label fails here.
    from consensus.methods import accuracy, demand_pattern, reconcile, statistical, weights
    from consensus.pack.inputs import STATUSES
    from consensus.workflow import decisions

    assert set(statistical.METHODS) <= _keys(vocabulary.STATISTICAL_METHODS)
    assert set(weights.SCHEMES) <= _keys(vocabulary.WEIGHT_SCHEMES)
    assert set(weights.SEGMENTS) <= _keys(vocabulary.WEIGHT_SEGMENTS)
    assert set(reconcile.METHODS) <= _keys(vocabulary.RECONCILIATION_METHODS)
    assert set(accuracy.POOLED_LEVELS) <= _keys(vocabulary.LEVELS)
    assert set(demand_pattern.PATTERNS) <= _keys(vocabulary.DEMAND_PATTERNS)
    assert set(decisions.KINDS) <= _keys(vocabulary.DECISION_KINDS)
    assert set(STATUSES) <= _keys(vocabulary.PLAN_STATES)
    from consensus.workflow.cycles import STATUS_STATES

    assert set(STATUS_STATES) <= _keys(vocabulary.SUBMISSION_STATES)
    assert set(accuracy.MEASURES) <= _keys(vocabulary.MEASURES)


def test_the_run_and_intake_take_their_sources_from_the_registry():
    from consensus.intake import submission
    from consensus.methods import plan

    # No private copies: the run combines, and intake accepts, what the registry says.
    assert plan.combined_sources is vocabulary.combined_sources
    assert submission.submitted_sources is vocabulary.submitted_sources
    assert set(vocabulary.combined_sources()) == {"statistical", "sales", "marketing", "dc"}


@pytest.mark.parametrize("name", list(REGISTRIES))
def test_one_label_for_one_thing_within_a_registry(name):
    registry = REGISTRIES[name]
    keys = [t.key for t in registry]
    assert len(keys) == len(set(keys)), name
    # Only the plan's two spellings of a draft ("open" cycle, "draft" run) share a label.
    labels = [t.label for t in registry if t.key != "open"]
    assert len(labels) == len(set(labels)), name


def test_sources_have_distinct_labels_orders_and_line_styles():
    sources = vocabulary.SOURCES
    for attribute in ("key", "label", "order", "dashes", "colour"):
        values = [getattr(s, attribute) for s in sources]
        assert len(values) == len(set(values)), attribute
    assert vocabulary.ordered(["dc", "sales", "consensus", "zeta", "statistical"]) == [
        "consensus", "statistical", "sales", "dc", "zeta"]


def test_every_method_has_a_published_source_or_says_common_practice():
    # Rule of the pack's methods page: a method is named with its source, or marked as common practice.
    for registry in (vocabulary.STATISTICAL_METHODS, vocabulary.WEIGHT_SCHEMES,
                     vocabulary.RECONCILIATION_METHODS, vocabulary.BAND_METHODS):
        for t in registry:
            if t.key in ("new_item_profile", "zero_demand"):
                continue  # the tool's own fallbacks, not published methods
            assert t.reference, t.key
            assert t.reference == "common practice" or re.search(r"\b(19|20)\d\d\b|Practice", t.reference), t


# --------------------------------------------------------------------------- phrases


@given(st.floats(min_value=0, max_value=1e7, allow_nan=False))
def test_a_set_decision_reads_as_a_new_total_never_as_a_change(amount):
    text = vocabulary.describe_change("set", amount)
    assert text.startswith("set to ")
    assert "+" not in text and "\u2212" not in text and "-" not in text
    assert int(text.removeprefix("set to ").replace(",", "")) == round(amount)


@pytest.mark.parametrize("kind, amount, expected", [
    ("set", 240, "set to 240"),
    ("set", 1200.4, "set to 1,200"),
    ("delta", 15, "raised by 15"),
    ("delta", -40, "lowered by 40"),
    ("pct", 8, "raised by 8%"),
    ("pct", -12.5, "lowered by 12.5%"),
    ("pct", 0, "left unchanged"),
])
def test_decisions_in_words(kind, amount, expected):
    # The wording: "set to 240", not "set +240".
    assert vocabulary.describe_change(kind, amount) == expected


@pytest.mark.parametrize("days, expected", [
    (None, "on time"), (float("nan"), "on time"), (-2, "on time"), (0, "on time"), (1, "1 day late"),
    (3, "3 days late"), (0.25, "1 day late"),
])
def test_days_late_in_words(days, expected):
    assert vocabulary.describe_days_late(days) == expected


def test_submission_states_in_words():
    assert vocabulary.describe_submission_state("received") == "Received"
    assert vocabulary.describe_submission_state("received", days_late=2) == "Received 2 days late"
    assert vocabulary.describe_submission_state("partly_received", days_late=1) == "Partly received 1 day late"
    assert vocabulary.describe_submission_state("not_received") == "Missing"
    assert vocabulary.describe_submission_state("not_received", days_late=3) == "Missing, 3 days late"
    assert vocabulary.describe_submission_state("replaced") == "Replaced by a later file"


def test_exception_counts_and_rules_carry_units_and_numbers():
    assert vocabulary.describe_count(1, "tracking") == "1 source"
    assert vocabulary.describe_count(41, "disagreement") == "41 items"
    rules = dict(ts_limit=4.0, change_threshold_pct=25.0, band_ratio_threshold=0.8, band_months=3,
                 disagreement_threshold=0.5, disagreement_min_units=10.0)
    assert "50% of the consensus" in vocabulary.describe_exception_rule("disagreement", **rules)
    assert "at least 10 units" in vocabulary.describe_exception_rule("disagreement", **rules)
    assert "above 4 " in vocabulary.describe_exception_rule("tracking", **rules)
    assert "25%" in vocabulary.describe_exception_rule("change", **rules)
    assert "80% of the plan over the next 3 months" in vocabulary.describe_exception_rule("band", **rules)
    unknown = vocabulary.describe_exception_rule("disagreement", **{**rules, "disagreement_threshold": None})
    assert "did not record" in unknown


def test_the_amplification_rule_and_count_carry_their_numbers_and_unit():
    # The limit of consensus.methods.amplification: 1.5 times the bound of a 12-month moving average.
    rules = dict(ts_limit=4.0, change_threshold_pct=25.0, band_ratio_threshold=0.8, band_months=3)
    rule = vocabulary.describe_exception_rule("amplification", **rules, amplification_multiple=1.5,
                                              amplification_moving_average_months=12)
    assert "above 1.5 times the bound of a 12-month moving average at its lead time" in rule
    assert vocabulary.describe_count(1, "amplification") == "1 DC"
    assert vocabulary.describe_count(3, "amplification") == "3 DCs"
    assert set(vocabulary.PATTERN_GROUP_OF.values()) <= {t.key for t in vocabulary.PATTERN_GROUPS}


def test_value_added_walks_back_to_a_baseline_that_is_present():
    assert vocabulary.value_added_order(["consensus", "sales", "naive", "statistical", "statistical_base"]) == [
        "naive", "statistical_base", "statistical", "sales", "consensus"]
    assert vocabulary.value_added_baseline("statistical", ["naive", "statistical_base"]) == "statistical_base"
    assert vocabulary.value_added_baseline("statistical", ["naive"]) == "naive"
    assert vocabulary.value_added_baseline("naive", ["statistical"]) is None


# --------------------------------------------------------------------------- inputs as the store gathers them


#: A run note of the kind the first wave printed on every methods page (the sample company's backtest figures).
SAMPLE_BACKTEST_NOTE = ("bottom_up is the default. Backtest on the demo (bench/bench_backtest.py): bottom_up 21.10 / "
                        "8.23 / 7.66 / 4.67, mint_shrink 21.16 / 7.99 / 7.26 / 4.35")


def store_shaped_inputs():
    """The example reshaped as workflow.meeting_pack gathers a cycle today: raw ids wherever the store has them."""
    base = example_pack_inputs()
    submissions = base.submissions.copy()
    submissions["status"] = "received"
    submissions["scope"] = ["all", "all", "region North", "region South"]
    submissions.loc[len(submissions)] = {
        "source": "statistical", "scope": "all", "filename": "statistical-2027-03.csv (computed)",
        "sha256": "ab" * 32, "submitted_by": "consensus", "submitted_at": pd.Timestamp("2027-04-05 07:00"),
        "status": "received", "rows": 9999}
    weights = base.weights.copy()
    weights["basis"] = np.where(weights["n_cycles"] < 10, "all", np.where(weights["n_cycles"] < 7, "equal",
                                                                           "segment"))
    weights["note"] = "segment: family X, lag 1: inverse-MSE weights shrunk toward equal with psi from shrunk_mse"
    decisions = base.decisions.copy()
    decisions["scope"] = ["item " + decisions["scope"][0], "family " + decisions["scope"][1] + " × region North",
                          "family " + decisions["scope"][1]]
    decisions["change"] = [vocabulary.describe_change(k, a) for k, a in zip(decisions["kind"], decisions["amount"])]
    coverage = pd.DataFrame({"level": ["item", "item"], "lag_bucket": ["all", "all"], "nominal": [0.8, 0.95],
                             "coverage": [0.89, 0.97], "winkler": [125.8, 269.2], "n": [4000, 4000]})
    notes = {
        "weights": "Scheme shrunk_mse, per family and lag bucket, from the last 12 cycles",
        "errors": "MAPE leaves out months with zero actual demand (counted in the scorecard as n_zero_actual).",
        "reconciliation": "bottom_up: the plan is made at item × location × month. " + SAMPLE_BACKTEST_NOTE,
    }
    return dataclasses.replace(
        base, submissions=submissions, missing=pd.DataFrame({"source": ["dc"], "scope": ["location DC-W1"]}),
        weights=weights, decisions=decisions, band_coverage=coverage, method_notes=notes, weight_scheme=None,
        weight_segment=None, weight_window_cycles=None, reconciliation_method=None,
        disagreement_threshold=None, disagreement_min_units=None, status="published",
    )


@pytest.fixture(scope="module", params=["example", "store-shaped"])
def pack_html(request) -> str:
    inputs = example_pack_inputs() if request.param == "example" else store_shaped_inputs()
    return build_html(inputs)


class PageReader(HTMLParser):
    """Visible text of a page, and its tables as header rows and body rows of (text, classes) cells."""

    hidden = {"style", "script", "head"}

    def __init__(self):
        super().__init__()
        self.text, self.tables, self.legend = [], [], []
        self._skip, self._cell, self._row, self._in_legend_item = 0, None, None, False

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if tag in self.hidden:
            self._skip += 1
        elif tag == "table":
            self.tables.append({"head": [], "body": []})
        elif tag == "tr" and self.tables:
            self._row = {"cells": [], "class": attrs.get("class") or ""}
        elif tag in ("td", "th") and self._row is not None:
            self._cell = {"text": "", "class": attrs.get("class") or "", "tag": tag}
        elif tag == "li" and "legend" in getattr(self, "_list_class", ""):
            self._in_legend_item = True
            self.legend.append("")
        elif tag == "ul":
            self._list_class = attrs.get("class") or ""

    def handle_endtag(self, tag):
        if tag in self.hidden:
            self._skip -= 1
        elif tag in ("td", "th") and self._cell is not None:
            self._row["cells"].append(self._cell)
            self._cell = None
        elif tag == "tr" and self._row is not None and self.tables:
            part = "head" if self._row["cells"] and all(c["tag"] == "th" for c in self._row["cells"]) else "body"
            self.tables[-1][part].append(self._row)
            self._row = None
        elif tag == "li":
            self._in_legend_item = False
        elif tag == "ul":
            self._list_class = ""

    def handle_data(self, data):
        if self._skip:
            return
        self.text.append(data)
        if self._cell is not None:
            self._cell["text"] += data
        if self._in_legend_item:
            self.legend[-1] += data


def read_page(html: str) -> PageReader:
    reader = PageReader()
    reader.feed(html)
    reader.close()
    return reader


def all_labels() -> set[str]:
    labels = {s.label for s in vocabulary.SOURCES} | {k.label for k in vocabulary.EXCEPTION_KINDS}
    for registry in REGISTRIES.values():
        labels |= {t.label for t in registry}
    return labels


#: Registry keys that are plain English words and may appear in prose ("the statistical forecast").
PLAIN_WORDS = {
    "sales", "marketing", "statistical", "consensus", "item", "family", "region", "total", "smooth", "erratic",
    "intermittent", "lumpy", "set", "delta", "equal", "best", "all", "segment", "late", "missing", "accepted",
    "rejected", "received", "replaced", "unchanged", "draft", "open", "published", "disagreement", "tracking",
    "change", "band", "empirical", "n", "bias", "amplification", "unknown",
    "regular", "sparse", "other",
}


def identifier_keys() -> set[str]:
    keys = {s.key for s in vocabulary.SOURCES} | {k.key for k in vocabulary.EXCEPTION_KINDS}
    for registry in REGISTRIES.values():
        keys |= {t.key for t in registry}
    return {k for k in keys if "_" in k or k not in PLAIN_WORDS}


@pytest.mark.slow
def test_no_raw_identifier_is_visible_text(pack_html):
    text = " ".join(read_page(pack_html).text)
    # Labels may contain a key as a word ("Seasonal naive"): take them out first, longest first.
    for label in sorted(all_labels(), key=len, reverse=True):
        text = text.replace(label, " ")
    leaked = {k for k in identifier_keys() if re.search(rf"(?<![\w-]){re.escape(k)}(?![\w-])", text)}
    assert leaked == set()


@pytest.mark.slow
def test_no_paths_and_no_lower_case_section_headings(pack_html):
    text = " ".join(read_page(pack_html).text)
    assert not re.search(r"\b\w+/\w+\.py\b|bench/|\.py\b", text)
    for heading in re.findall(r"<h3>([^<]+)", pack_html):
        assert heading.strip()[:1].isupper(), heading


def _columns(table, header: str) -> list[str]:
    """Texts under the header cell ``header`` in a table's last header row (rows of other shapes skipped)."""
    if not table["head"]:
        return []
    head = [c["text"].strip() for c in table["head"][-1]["cells"]]
    if header not in head:
        return []
    at = head.index(header)
    return [row["cells"][at]["text"].strip() for row in table["body"]
            if len(row["cells"]) == len(head) and "weights-basis" not in row["class"]]


def _shown(reader: PageReader, header: str) -> list[str]:
    return [t for table in reader.tables for t in _columns(table, header) if t and t != "–"]


def test_every_source_level_state_and_kind_shown_is_a_registry_label(pack_html):
    reader = read_page(pack_html)
    sources = {s.label for s in vocabulary.SOURCES}
    levels = {t.label for t in vocabulary.LEVELS}
    kinds = {k.label for k in vocabulary.EXCEPTION_KINDS}
    methods = {t.label for t in vocabulary.STATISTICAL_METHODS}
    states = {t.label for t in vocabulary.SUBMISSION_STATES}

    for header in ("Source", "Lowest source", "Highest source", "Step", "Compared with", "Best single source"):
        for name in _shown(reader, header):
            assert name in sources, (header, name)
    assert {"Sales", "Distribution centers", "Statistical"} <= set(_shown(reader, "Source"))
    assert set(_shown(reader, "Step")) >= {"Seasonal naive", "Statistical before events", "Consensus"}
    for name in _shown(reader, "Level"):
        assert name in levels, name
    for header in ("Kind", "Exception"):
        for name in _shown(reader, header):
            assert name.removeprefix("⚑").strip() in kinds, name
    for name in _shown(reader, "Method") + _shown(reader, "Method used this cycle"):
        assert name.rstrip("†") in methods, name
    for name in _shown(reader, vocabulary.STATE_HEADING):
        word = name.removeprefix("⚑").strip().split(":")[0]
        assert word in states or re.fullmatch(r"(Received|Missing,) \d+ days? late", word), name
    # Headers over sources and levels: the family month table and the scorecard's level table.
    family_headers = [c["text"].strip().rstrip("*") for t in reader.tables if t["head"]
                      for c in t["head"][-1]["cells"] if "src" in c["class"].split()]
    assert family_headers and set(family_headers) <= sources
    level_headers = [c["text"].strip() for t in reader.tables if t["head"]
                     for c in t["head"][-1]["cells"] if c["text"].strip() in levels]
    assert "Family × region" in level_headers
    legend = [e.strip() for e in reader.legend]
    assert set(legend) - {"Actual", "80% band", "95% band", "Last cycle's plan"} <= sources
    # Order amplification: each DC's standing, and the measures over its columns, are registry labels.
    amplification_states = {t.label for t in vocabulary.AMPLIFICATION_STATES}
    stands = _shown(reader, "Where it stands")
    assert stands and set(stands) <= amplification_states
    measures = {t.label for t in vocabulary.MEASURES}
    amplification_headers = {c["text"].strip() for t in reader.tables if _columns(t, "Where it stands")
                             for c in t["head"][-1]["cells"]}
    assert {"Variance ratio", "Bound", "Limit"} <= amplification_headers & measures
    # Accuracy by demand pattern: the patterns over its column groups are the patterns' registry labels.
    patterns = {t.label for t in vocabulary.DEMAND_PATTERNS}
    pattern_groups = [c["text"].strip() for t in reader.tables if len(t["head"]) > 1 and _columns(t, "MASE")
                      for c in t["head"][0]["cells"][1:]]
    assert pattern_groups
    for text in pattern_groups:  # the label, then how many series have the pattern this cycle
        assert any(re.fullmatch(rf"{re.escape(p)}( [\d,]+ series this cycle)?", text) for p in patterns), text


def test_exception_headings_are_the_kind_names_with_units_and_rules(pack_html):
    reader = read_page(pack_html)
    kinds_table = next(t for t in reader.tables if _columns(t, "Kind"))
    rows = {row["cells"][0]["text"].removeprefix("⚑").strip(): [c["text"] for c in row["cells"]]
            for row in kinds_table["body"]}
    headings = [h.strip() for h in re.findall(r"<h3>([^<]+)<span", pack_html)]
    for kind in vocabulary.EXCEPTION_KINDS:
        assert kind.label in rows and kind.label in headings
        count = rows[kind.label][2]
        assert re.fullmatch(rf"\d[\d,]* ({'|'.join(map(re.escape, kind.counts))})", count), count
    assert "above 4 " in rows["Persistent bias"][1] and "25%" in rows["Large changes since last cycle"][1]
    assert "Questions for this meeting" in pack_html and "Decisions for this meeting" not in pack_html


# --------------------------------------------------------------------------- what the pages say


@pytest.mark.slow
def test_decisions_read_set_to_not_a_signed_change():
    html = build_html(store_shaped_inputs())
    log = html[html.index('id="decisions"'):html.index('id="components"')]
    assert "set to 1,200" in log and "raised by 15%" in log and "lowered by 8%" in log
    assert "set +1,200" not in html and "pct +15" not in html


@pytest.mark.slow
def test_lateness_is_worded_only_when_it_is_known():
    base = store_shaped_inputs()
    html = build_html(base)
    assert "no due date is recorded" in html and "late" not in " ".join(
        c["text"] for t in read_page(html).tables for r in t["body"] for c in r["cells"])
    late = base.submissions.assign(days_late=[0, 2, 0, 0, 0])
    html = build_html(dataclasses.replace(base, submissions=late))
    assert "Received 2 days late" in html and "no due date is recorded" not in html


def methods_section(html: str) -> str:
    return html[html.index('id="methods"'):]


@pytest.mark.slow
def test_methods_page_prints_no_run_notes_paths_or_sample_figures():
    html = methods_section(build_html(store_shaped_inputs()))
    text = " ".join(read_page(html).text)
    assert "bench" not in text and "21.10" not in text and "mint_shrink" not in text
    assert SAMPLE_BACKTEST_NOTE[:40] not in text and "Scheme shrunk_mse" not in text
    assert "did not record" in text  # settings the run did not pass are said to be unknown, not guessed


@pytest.mark.slow
def test_methods_page_measures_this_stores_history():
    inputs = example_pack_inputs()
    context = build_pack_context(inputs, with_charts=False)
    accuracy = {row["level"]: row for row in context["methods"]["accuracy"]}
    # Oracle: the consensus's WAPE at item × location, n-weighted over lag buckets with numpy on the raw rows.
    card = inputs.scorecard[(inputs.scorecard["source"] == "consensus") & (inputs.scorecard["level"] == "item")]
    expected = np.average(card["wape"], weights=card["n"])
    assert accuracy["Item × location"]["consensus"] == pytest.approx(expected)
    combined = inputs.scorecard[(inputs.scorecard["level"] == "total")
                                & inputs.scorecard["source"].isin(vocabulary.combined_sources())]
    by_source = combined.groupby("source").apply(lambda g: np.average(g["wape"], weights=g["n"]))
    assert accuracy["Total"]["best"] == pytest.approx(by_source.min())
    assert accuracy["Total"]["best_label"] == vocabulary.source_label(by_source.idxmin())
    html = methods_section(build_html(inputs))
    assert f"{len(inputs.scorecard_history['cycle'].unique())} past cycles" in html
    assert "Inverse mean squared error, pulled toward equal" in html and "Bates &amp; Granger 1969" in html
    assert "Bottom-up" in html


@pytest.mark.slow
def test_methods_page_says_not_enough_history_when_there_is_too_little():
    inputs = example_pack_inputs()
    recent = sorted(inputs.scorecard_history["cycle"].unique())[-(MIN_HISTORY_CYCLES - 1):]
    short = dataclasses.replace(inputs, scorecard_history=inputs.scorecard_history[
        inputs.scorecard_history["cycle"].isin(recent)])
    html = methods_section(build_html(short))
    assert "Not enough history yet" in html
    assert "Consensus WAPE" not in html and "Actuals inside" not in html


def test_colour_means_better_or_worse_only_where_direction_is_good_or_bad():
    css = (reports_dir() / "styles" / "pack.css").read_text(encoding="utf-8")
    # Plain ups and downs carry no colour rule at all.
    assert not re.search(r"\.chg\.(up|down)\s*\{", css)
    # The table's tones are the chart's bar colours.
    for tone in ("better", "worse"):
        rule = re.search(rf"\.chg\.{tone}\s*\{{\s*color:\s*(#[0-9a-fA-F]{{6}})", css)
        assert rule and rule.group(1).lower() == TONE_COLOURS[tone].lower(), tone
    context = build_pack_context(example_pack_inputs(), with_charts=False)
    for row in context["fva"]["rows"]:
        if row["change"] is not None and round(row["change"], 1) != 0:
            assert row["tone"] == ("better" if row["change"] < 0 else "worse"), row


@pytest.mark.slow
def test_a_new_source_kind_is_one_registry_entry(monkeypatch):
    finance = vocabulary.SourceKind("finance", "Finance plan", "Fin", 35, submitted=True, combined=True,
                                    answers_for="all", colour="#3f7f3f", dashes=(0, (3, 3)),
                                    description="the finance team's revenue plan in units")
    monkeypatch.setattr(vocabulary, "SOURCES", vocabulary.SOURCES + (finance,))
    base = example_pack_inputs()
    extra = base.sources[base.sources["source"] == "sales"].assign(
        source="finance", quantity=lambda f: f["quantity"] * 0.97)
    card = base.scorecard[base.scorecard["source"] == "sales"].assign(source="finance", tracking_signal=0.5)
    weights = base.weights[base.weights["source"] == "sales"].assign(source="finance")
    fva = pd.concat([base.fva, pd.DataFrame({"step": ["finance"], "wape": [24.0], "n": [864]})], ignore_index=True)
    inputs = dataclasses.replace(base, sources=pd.concat([base.sources, extra], ignore_index=True),
                                 scorecard=pd.concat([base.scorecard, card], ignore_index=True),
                                 weights=pd.concat([base.weights, weights], ignore_index=True), fva=fva)
    html = build_html(inputs)
    reader = read_page(html)
    assert "Finance plan" in [e.strip() for e in reader.legend]
    family_page = html[html.index('id="family-1"'):html.index('id="family-2"')]
    assert "Finance plan" in family_page and finance.colour in family_page  # legend swatch and chart line
    scorecard = html[html.index('id="scorecard"'):html.index('id="value-added"')]
    assert "Finance plan" in scorecard
    value_added = read_page(html[html.index('id="value-added"'):html.index('id="decisions"')])
    steps = _shown(value_added, "Step")
    assert "Finance plan" in steps
    # Sorted by the registry: after what people send (marketing's order is 30, finance's 35), before consensus.
    assert steps.index("Finance plan") == steps.index("Marketing") + 1
    assert steps[-1] == "Consensus"


@pytest.mark.slow
def test_a_source_missing_from_the_registry_still_prints_in_words():
    base = example_pack_inputs()
    extra = base.sources[base.sources["source"] == "sales"].assign(source="field_sales")
    html = build_html(dataclasses.replace(base, sources=pd.concat([base.sources, extra], ignore_index=True)))
    reader = read_page(html)
    assert "Field sales" in [e.strip() for e in reader.legend]
    assert "field_sales" not in " ".join(reader.text)


@pytest.mark.slow
def test_the_demo_words_its_decisions_as_the_pack_does(demo_dir):
    # The terminal said "set +240.0" while the pack said "set to 240": one wording, from describe_change.
    said = (demo_dir.parent / "stdout.txt").read_text(encoding="utf-8")
    decisions = [line for line in said.splitlines() if line.startswith("decision:")]
    assert decisions and all(" by " in line for line in decisions)
    assert any("set to 240" in line for line in decisions) and any("raised by 8%" in line for line in decisions)
    assert not any("set +" in line or "pct +" in line for line in decisions)
