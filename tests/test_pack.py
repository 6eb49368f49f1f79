"""The meeting pack: PDF and HTML from the same templates, escaped inputs, no fetches, right numbers."""

from __future__ import annotations

import dataclasses
import re
from html.parser import HTMLParser

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from consensus.errors import InvalidSpec
from consensus import vocabulary
from consensus.pack.charts import legend_entries
from consensus.pack.context import (
    MONO_ADVANCE_EM,
    build_pack_context,
    format_change,
    format_percent,
    format_quantity,
    summarise_series,
)
from consensus.pack.inputs import FRAME_COLUMNS, PackInputs, empty_frame, example_pack_inputs
from consensus.pack.render import build_html, render_pack, restricted_fetcher
from consensus.pack.textgrid import GridColumn, lay_out_text_grid
from consensus.periods import horizon_months
from consensus.resources import reports_dir

#: The slow tier: it lays out PDF packs with WeasyPrint (the fast tier is pytest -m 'not slow').
pytestmark = pytest.mark.slow

pypdf = pytest.importorskip("pypdf")

HOSTILE = '<b>x</b><img src="http://example.invalid/a.png">'
HOSTILE_PATH = "file:///etc/passwd"


def pdf_pages_text(path) -> list[str]:
    reader = pypdf.PdfReader(str(path))
    return [page.extract_text() or "" for page in reader.pages]


def squash(text: str) -> str:
    """Text with all whitespace removed, so words broken across lines by extraction still match."""
    return re.sub(r"\s+", "", text)


@pytest.fixture(scope="module")
def draft_inputs() -> PackInputs:
    return example_pack_inputs()


@pytest.fixture(scope="module")
def draft_pack(draft_inputs, tmp_path_factory):
    out = tmp_path_factory.mktemp("draft")
    return render_pack(draft_inputs, pdf_path=out / "pack.pdf", html_path=out / "pack.html")


@pytest.fixture(scope="module")
def hostile_pack(draft_inputs, tmp_path_factory):
    decisions = draft_inputs.decisions.copy()
    decisions.loc[0, "reason"] = HOSTILE
    decisions.loc[1, "reason"] = f"see {HOSTILE_PATH} and /etc/hostname"
    decisions.loc[2, "author"] = '<img src="file:///etc/hostname">'
    notes = {**draft_inputs.method_notes, "Weights": '<link rel="stylesheet" href="http://example.invalid/x.css">'}
    hostile = dataclasses.replace(
        draft_inputs,
        company='Acme <script>alert(1)</script> <img src="http://example.invalid/logo.png">',
        decisions=decisions,
        method_notes=notes,
    )
    out = tmp_path_factory.mktemp("hostile")
    return render_pack(hostile, pdf_path=out / "pack.pdf", html_path=out / "pack.html")


# --------------------------------------------------------------------------- PDF shows the inputs' numbers


def test_pdf_shows_the_twelve_month_total_of_the_inputs(draft_inputs, draft_pack):
    # Oracle: a plain pandas sum of the input consensus over the next 12 planned months.
    months = horizon_months(draft_inputs.cycle, 12)
    frame = draft_inputs.consensus
    expected = format_quantity(frame.loc[frame["period"].isin(months), "consensus"].sum())
    summary_pages = [t for t in pdf_pages_text(draft_pack.pdf_path) if "Questions for this meeting" in t]
    assert summary_pages, "no executive summary page in the PDF"
    assert expected in summary_pages[0]
    assert draft_pack.html.count(expected) >= 2  # headline and total row


def test_pdf_three_month_family_figures_match_a_direct_groupby(draft_inputs, draft_pack):
    # Oracle: pandas groupby of the input rows, independent of the context code.
    months = horizon_months(draft_inputs.cycle, 3)
    rows = draft_inputs.consensus.merge(draft_inputs.items, on="item")
    by_family = rows[rows["period"].isin(months)].groupby("family")["consensus"].sum()
    text = squash(" ".join(pdf_pages_text(draft_pack.pdf_path)))
    for family, value in by_family.items():
        assert squash(f"{family}{format_quantity(value)}") in text


def test_pdf_has_a_page_for_every_family(draft_inputs, draft_pack):
    pages = pdf_pages_text(draft_pack.pdf_path)
    for family in sorted(draft_inputs.items["family"].unique()):
        # The family's title is a heading line of exactly one page.
        headings = [t for t in pages if re.search(rf"^Family\s+{re.escape(family)}\s*$", t, re.M)]
        assert len(headings) == 1, family


@pytest.mark.parametrize("status", ["draft", "published"])
def test_cover_states_the_status(draft_inputs, tmp_path, status):
    inputs = dataclasses.replace(draft_inputs, status=status)
    pack = render_pack(inputs, pdf_path=tmp_path / "pack.pdf")
    cover = pdf_pages_text(pack.pdf_path)[0]
    assert status.upper() in cover
    other = {"draft": "PUBLISHED", "published": "DRAFT"}[status]
    assert other not in cover


def test_page_numbers_and_contents_resolve(draft_pack):
    pages = pdf_pages_text(draft_pack.pdf_path)
    n = len(pages)
    assert n == draft_pack.n_pages
    assert f"Page {n} of {n}" in pages[-1]
    contents = next(t for t in pages if re.search(r"^Contents$", t, re.M))
    summary_page = next(i for i, t in enumerate(pages, start=1) if "Questions for this meeting" in t)
    # target-counter filled the contents line with the summary's real page number.
    assert re.search(rf"Executive summary[ .]*{summary_page}\b", contents)


# --------------------------------------------------------------------------- safety


def test_markup_in_inputs_is_plain_text_in_html(hostile_pack):
    html = hostile_pack.html
    assert "&lt;b&gt;x&lt;/b&gt;&lt;img src=" in html
    assert '<img src="http://example.invalid' not in html
    assert "<script>" not in html
    assert '<link rel="stylesheet" href="http://example.invalid' not in html


def test_markup_and_paths_in_inputs_cause_no_fetch(hostile_pack):
    assert hostile_pack.refused == ()
    assert not any("example.invalid" in url or "/etc/" in url for url in hostile_pack.fetched)
    # The only things fetched are the pack's own charts as data: URIs.
    assert all(url.startswith("data:image/svg+xml") for url in hostile_pack.fetched)


def test_markup_in_inputs_prints_as_text_in_pdf(hostile_pack):
    text = squash(" ".join(pdf_pages_text(hostile_pack.pdf_path)))
    assert squash(HOSTILE) in text
    assert squash(HOSTILE_PATH) in text


def test_fetcher_refuses_and_records_anything_outside_the_package(tmp_path):
    import weasyprint

    fetcher = restricted_fetcher()
    outside = tmp_path / "secret.css"
    outside.write_text("body { color: red }")
    html = (
        '<img src="http://example.invalid/a.png">'
        f'<link rel="stylesheet" href="{outside.as_uri()}">'
        '<img src="file:///etc/passwd">'
    )
    weasyprint.HTML(string=html, base_url=str(reports_dir()) + "/", url_fetcher=fetcher).render()
    assert set(fetcher.refused) == {"http://example.invalid/a.png", outside.as_uri(), "file:///etc/passwd"}
    assert fetcher.fetched == []


def test_fetcher_serves_the_packages_own_files():
    import weasyprint

    fetcher = restricted_fetcher()
    css = (reports_dir() / "styles" / "pack.css").as_uri()
    weasyprint.HTML(string=f'<link rel="stylesheet" href="{css}"><p>x</p>', url_fetcher=fetcher).render()
    assert fetcher.fetched == [css]
    assert fetcher.refused == []


# --------------------------------------------------------------------------- HTML structure


class SectionCounter(HTMLParser):
    """Checks that <main>/<section>/<svg> open and close in order, and collects section ids."""

    tracked = {"main", "section", "svg", "table", "figure", "nav"}

    def __init__(self):
        super().__init__()
        self.stack, self.section_ids, self.svg_count, self.errors = [], [], 0, []

    def handle_starttag(self, tag, attrs):
        if tag in self.tracked:
            self.stack.append(tag)
            if tag == "section":
                self.section_ids.append(dict(attrs).get("id"))
            if tag == "svg":
                self.svg_count += 1

    def handle_endtag(self, tag):
        if tag in self.tracked:
            if not self.stack or self.stack[-1] != tag:
                self.errors.append(f"unbalanced </{tag}> with open {self.stack[-3:]}")
            else:
                self.stack.pop()


def test_html_parses_with_balanced_sections_and_inline_svg(draft_inputs, draft_pack):
    parser = SectionCounter()
    parser.feed(draft_pack.html)
    parser.close()
    assert parser.errors == [] and parser.stack == []
    n_families = draft_inputs.items["family"].nunique()
    for section in ("cover", "summary", "exceptions", "by-family", "scorecard", "patterns", "value-added",
                    "amplification", "decisions", "components", "methods"):
        assert section in parser.section_ids
    assert sum(1 for s in parser.section_ids if s and s.startswith("family-")) == n_families
    # One chart per family plus the scorecard history, the value-added steps and order amplification by DC.
    assert parser.svg_count == n_families + 3
    assert draft_pack.html_path.read_text(encoding="utf-8") == draft_pack.html


def test_html_and_pdf_come_from_the_same_templates(draft_inputs, draft_pack):
    assert build_html(draft_inputs) == draft_pack.html
    pdf_text = squash(" ".join(pdf_pages_text(draft_pack.pdf_path)))
    for heading in re.findall(r'<h2 class="section-title">([^<]+)</h2>', draft_pack.html):
        assert squash(heading) in pdf_text


def test_svg_ids_are_unique_across_the_page(draft_pack):
    ids = re.findall(r'\sid="([^"]+)"', draft_pack.html)
    assert len(ids) == len(set(ids))


def test_every_source_line_differs_by_dash_pattern_not_only_colour():
    # Common practice for colour-blind-safe charts: a second cue besides hue.
    keys = [s.key for s in vocabulary.SOURCES]
    dashes = [s.dashes for s in vocabulary.SOURCES]
    assert len(set(dashes)) == len(dashes)
    entries = legend_entries(keys)
    swatches = {e["css"] for e in entries if e.get("source") in keys}
    assert len(swatches) == len(keys)


# --------------------------------------------------------------------------- numbers and context


def test_number_formats():
    # Thousands separators and signed changes with a symbol: common practice in management reports.
    assert format_quantity(1234567.4) == "1,234,567"
    assert format_quantity(float("nan")) == "–"
    assert format_change(-1234) == "▼ \u22121,234"
    assert format_change(56) == "▲ +56"
    assert format_change(0.2) == "0"
    assert format_percent(-3.14159, signed=True) == "▼ \u22123.1%"


@given(st.integers(min_value=-10**12, max_value=10**12))
def test_formatted_quantity_reads_back_as_the_same_integer(value):
    text = format_quantity(value)
    assert re.fullmatch(r"\u2212?\d{1,3}(,\d{3})*", text)
    assert int(text.replace(",", "").replace("\u2212", "-")) == value


@settings(deadline=None, max_examples=12)
@given(seed=st.integers(min_value=0, max_value=10_000), n_families=st.integers(min_value=1, max_value=5))
def test_family_figures_add_up_and_bands_nest(seed, n_families):
    inputs = example_pack_inputs(n_families=n_families, n_items=n_families * 3, seed=seed)
    context = build_pack_context(inputs, with_charts=False)
    for position, window in enumerate(context["summary"]["windows"]):
        family_sum = sum(row["windows"][position]["consensus"] for row in context["summary"]["rows_all"])
        assert family_sum == pytest.approx(window["total"]["consensus"])
        months = horizon_months(inputs.cycle, window["months"])
        raw = inputs.consensus.loc[inputs.consensus["period"].isin(months), "consensus"].sum()
        assert window["total"]["consensus"] == pytest.approx(raw)
    for page in context["families"]:
        for row in page["rows"]:
            assert row["lower_95"] <= row["lower_80"] + 1e-9 <= row["consensus"] + 2e-9
            assert row["consensus"] <= row["upper_80"] + 1e-9 <= row["upper_95"] + 2e-9


def test_family_band_is_the_runs_stored_family_band(draft_inputs):
    # The family page prints the band the run stored for the family (from the family plans' own errors);
    # it no longer adds item bands up as if item errors were independent.
    context = build_pack_context(draft_inputs, with_charts=False)
    page = context["families"][0]
    stored = draft_inputs.level_bands
    row = stored[(stored["level"] == "family") & (stored["node"] == page["name"])
                 & (stored["period"] == page["rows"][0]["period"])].iloc[0]
    assert page["rows"][0]["upper_80"] == pytest.approx(row["upper_80"], abs=0.5)
    assert page["rows"][0]["lower_80"] == pytest.approx(row["lower_80"], abs=0.5)
    rows = draft_inputs.consensus.merge(draft_inputs.items, on="item")
    month = rows[(rows["family"] == page["name"]) & (rows["period"] == page["rows"][0]["period"])]
    independent = month["consensus"].sum() + np.sqrt(((month["upper_80"] - month["consensus"]) ** 2).sum())
    assert page["rows"][0]["upper_80"] > independent  # the example's items miss together: wider than √Σ


def test_biggest_change_names_the_source_that_moved(draft_inputs):
    inputs = draft_inputs
    item = inputs.items["item"].iloc[3]
    previous = inputs.consensus[["item", "location", "period", "consensus"]].copy()
    consensus = inputs.consensus.copy()
    mask = consensus["item"] == item
    consensus.loc[mask, "consensus"] = previous.loc[mask, "consensus"] * 3  # a move nobody can miss
    sources = inputs.sources.copy()
    cell = sources.merge(previous, on=["item", "location", "period"], how="left")["consensus"].to_numpy()
    sources["quantity"] = cell  # every source agrees with last plan …
    moved = (sources["item"] == item) & (sources["source"] == "sales")
    sources.loc[moved, "quantity"] = sources.loc[moved, "quantity"] * 5  # … except sales for this item
    changed = dataclasses.replace(inputs, consensus=consensus, previous=previous, sources=sources)
    top = build_pack_context(changed, with_charts=False)["top_changes"]
    assert top[0]["item"] == item
    assert top[0]["why"].startswith(f"{vocabulary.source_label('sales')} moved ▲")


def test_exceptions_are_ranked_by_money_at_stake(draft_inputs):
    context = build_pack_context(draft_inputs, with_charts=False)
    stakes = [row["at_stake"] for row in context["exceptions"]["ranked"]]
    assert stakes == sorted(stakes, reverse=True)
    kinds = {row["kind"] for row in context["exceptions"]["ranked"]}
    assert {"tracking", "missing", "disagreement"} <= kinds
    # The invented scenario makes marketing persistently optimistic: |TS| > 4 is flagged.
    assert {row["source"] for row in context["exceptions"]["biased"]} == {"marketing"}


def test_pack_renders_with_empty_optional_frames(draft_inputs, tmp_path):
    empties = {name: empty_frame(name) for name in
               ("previous", "disagreement", "decisions", "components", "band_coverage", "scorecard_history",
                "fva", "missing", "submissions", "scorecard", "weights", "series", "amplification",
                "accuracy_patterns")}
    bare = dataclasses.replace(draft_inputs, method_notes={}, amplification_min_months=None, **empties)
    pack = render_pack(bare, pdf_path=tmp_path / "bare.pdf")
    text = " ".join(pdf_pages_text(pack.pdf_path))
    assert "No published previous cycle to compare with." in text
    assert "No overrides this cycle." in text
    assert squash("No distribution center forecasts to measure yet.") in squash(text)
    assert squash("No accuracy by demand pattern yet") in squash(text)
    assert pack.refused == ()


def test_invalid_inputs_raise_typed_errors(draft_inputs):
    with pytest.raises(InvalidSpec):
        dataclasses.replace(draft_inputs, status="final")
    with pytest.raises(InvalidSpec):
        dataclasses.replace(draft_inputs, consensus=draft_inputs.consensus.drop(columns=["upper_95"]))
    with pytest.raises(InvalidSpec):
        build_pack_context(draft_inputs, ts_limit=0)
    assert list(empty_frame("consensus").columns) == list(FRAME_COLUMNS["consensus"])


# --------------------------------------------------------------------------- the statistical method per item


def test_series_frame_is_optional_for_existing_callers(draft_inputs):
    fields = {f.name: getattr(draft_inputs, f.name) for f in dataclasses.fields(PackInputs) if f.name != "series"}
    bare = PackInputs(**fields)
    assert list(bare.series.columns) == list(FRAME_COLUMNS["series"])
    assert bare.series.empty
    assert "Statistical forecast per item" not in build_html(bare)


def test_amplification_and_pattern_frames_are_optional_for_existing_callers(draft_inputs):
    new = ("amplification", "accuracy_patterns", "amplification_min_months")
    bare = PackInputs(**{f.name: getattr(draft_inputs, f.name) for f in dataclasses.fields(PackInputs)
                         if f.name not in new})
    assert bare.amplification.empty and bare.accuracy_patterns.empty and bare.amplification_min_months is None
    assert list(bare.amplification.columns) == list(FRAME_COLUMNS["amplification"])
    with pytest.raises(InvalidSpec):
        dataclasses.replace(draft_inputs, amplification=draft_inputs.amplification.drop(columns=["limit"]))


def test_item_method_is_the_most_common_and_wape_is_demand_weighted():
    # Hand example: three locations of one item; oracle is numpy on the same rows.
    import pandas as pd

    series = pd.DataFrame({
        "item": ["A", "A", "A"], "location": ["L1", "L2", "L3"],
        "pattern": ["smooth", "smooth", "erratic"], "method": ["ses", "croston", "ses"],
        "holdout_wape": [0.10, 0.40, 0.20], "fallback": ["", "", ""],
    })
    items = pd.DataFrame({"item": ["A"], "family": ["F"], "unit_price": [1.0]})
    months = [f"2026-{m:02d}" for m in range(1, 13)]
    demand = {"L1": 10.0, "L2": 30.0, "L3": 60.0}
    actuals = pd.DataFrame([{"item": "A", "location": loc, "period": m, "quantity": q}
                            for loc, q in demand.items() for m in months])
    # An older month outside the 12-month weight window must not count.
    actuals.loc[len(actuals)] = {"item": "A", "location": "L1", "period": "2025-12", "quantity": 10_000.0}
    out = summarise_series(series, items, actuals, "2026-12").iloc[0]
    assert (out["method"], out["method_count"], out["n_locations"]) == ("ses", 2, 3)
    assert (out["pattern"], out["pattern_count"]) == ("smooth", 2)
    weights = np.array([10, 30, 60]) * 12.0
    assert out["holdout_wape"] == pytest.approx(np.average([0.10, 0.40, 0.20], weights=weights))


@settings(deadline=None, max_examples=25)
# orders are stored as scaled integers (consensus.store.columnar), so never subnormal
@given(st.lists(st.tuples(st.floats(0.0, 2.0), st.floats(0.0, 500.0, allow_subnormal=False),
                          st.sampled_from(["ses", "sba", "holt"])), min_size=1, max_size=6),
       st.randoms(use_true_random=False))
def test_item_wape_lies_between_its_locations_and_ignores_row_order(rows, rng):
    import pandas as pd

    locations = [f"L{i}" for i in range(len(rows))]
    series = pd.DataFrame({"item": "A", "location": locations, "pattern": "smooth",
                           "method": [m for _, _, m in rows], "holdout_wape": [w for w, _, _ in rows],
                           "fallback": ""})
    actuals = pd.DataFrame({"item": "A", "location": locations, "period": "2026-12",
                            "quantity": [q for _, q, _ in rows]})
    items = pd.DataFrame({"item": ["A"], "family": ["F"], "unit_price": [1.0]})
    out = summarise_series(series, items, actuals, "2026-12").iloc[0]
    wapes = [w for w, _, _ in rows]
    assert min(wapes) - 1e-12 <= out["holdout_wape"] <= max(wapes) + 1e-12  # a weighted mean
    order = list(range(len(rows)))
    rng.shuffle(order)
    shuffled = summarise_series(series.iloc[order], items, actuals.iloc[order], "2026-12").iloc[0]
    assert shuffled["holdout_wape"] == pytest.approx(out["holdout_wape"])
    assert (shuffled["method"], shuffled["method_count"]) == (out["method"], out["method_count"])


def test_family_pages_show_each_items_pattern_method_and_fallback(draft_inputs, draft_pack):
    pages = pdf_pages_text(draft_pack.pdf_path)
    series = draft_inputs.series.merge(draft_inputs.items, on="item")
    fallback = series[series["fallback"] != ""].iloc[0]
    page = next(t for t in pages if re.search(rf"^Family\s+{re.escape(fallback['family'])}\s*$", t, re.M))
    assert "Statistical forecast per item" in page
    for item in series.loc[series["family"] == fallback["family"], "item"].unique():
        assert item in page
    assert "†" in page and squash(f"{fallback['item']}at{fallback['location']}") in squash(page)
    start = next(i for i, t in enumerate(pages) if "The methods behind this pack" in t)
    methods = " ".join(pages[start:])
    # The class cut-offs of Syntetos, Boylan & Croston (2005), as in consensus.methods.demand_pattern.
    assert "1.32" in methods and "0.49" in methods and "Syntetos" in methods


def test_a_family_of_25_items_with_fallbacks_stays_on_one_page(tmp_path):
    # The bench's family size (5,000 items over 200 families); every family heading is one page apart.
    inputs = example_pack_inputs(n_families=2, n_items=50, seed=11)
    assert (inputs.series["fallback"] != "").sum() >= 2
    pack = render_pack(inputs, pdf_path=tmp_path / "pack.pdf", workers=1)
    pages = pdf_pages_text(pack.pdf_path)
    families = list(inputs.items["family"].unique())
    at = [i for i, t in enumerate(pages) for f in families if re.search(rf"^Family\s+{re.escape(f)}\s*$", t, re.M)]
    assert len(at) == 2 and at[1] - at[0] == 1
    assert inputs.series.groupby(inputs.series["item"].map(inputs.items.set_index("item")["family"]))[
        "item"].nunique().min() == 25
    assert all("Statistical forecast per item" in pages[i] for i in at)


# --------------------------------------------------------------------------- fixed-width text tables


@settings(deadline=None, max_examples=50)
@given(st.lists(st.tuples(st.text("abcXYZ-1", min_size=1, max_size=9), st.integers(-10**7, 10**7),
                          st.text("pqr", min_size=1, max_size=5)), min_size=1, max_size=12))
def test_text_grid_lines_read_back_into_their_columns(rows):
    import pandas as pd

    values = pd.DataFrame({"a": [r[0] for r in rows], "b": [format_quantity(r[1]) for r in rows],
                           "c": [r[2] for r in rows]})
    grid = lay_out_text_grid(values, [GridColumn("A", "left"), GridColumn("B"), GridColumn("C", "left")])
    assert sum(c["width"] for c in grid.columns) == grid.width
    # Every field starts and ends where its header cell does, so splitting on blanks gives the values back.
    edges = np.cumsum([0] + [c["width"] for c in grid.columns])
    for line, row in zip(grid.lines, values.itertuples(index=False)):
        padded = line.ljust(grid.width)
        cells = [padded[edges[k]:edges[k + 1]] for k in range(len(grid.columns))]
        labelled = [cell for cell, c in zip(cells, grid.columns) if c["label"] is not None]
        assert [cell.strip() for cell in labelled] == list(row)
        assert labelled[1].endswith(row[1])  # right-aligned: flush with its column's right edge


def test_monospaced_advance_matches_the_font_file():
    # Source: the hmtx table of the installed DejaVu Sans Mono, read with fontTools.
    from pathlib import Path

    ttlib = pytest.importorskip("fontTools.ttLib")
    path = Path("/usr/share/fonts/truetype/dejavu/DejaVuSansMono.ttf")
    if not path.exists():
        pytest.skip("DejaVu Sans Mono not installed")
    font = ttlib.TTFont(str(path))
    cmap, metrics, units = font.getBestCmap(), font["hmtx"], font["head"].unitsPerEm
    advances = {metrics[cmap[ord(ch)]][0] for ch in "0123456789,– −+▲▼%†ITM-abc"}
    assert advances == {round(MONO_ADVANCE_EM * units)}


# --------------------------------------------------------------------------- a pack laid out in parts


@pytest.fixture(scope="module")
def parts_inputs() -> PackInputs:
    return example_pack_inputs(n_families=5, n_items=60, seed=3)


@pytest.fixture(scope="module")
def parts_pack(parts_inputs, tmp_path_factory):
    out = tmp_path_factory.mktemp("parts")
    return render_pack(parts_inputs, pdf_path=out / "pack.pdf", workers=2)


@pytest.fixture(scope="module")
def whole_pack(parts_inputs, tmp_path_factory):
    out = tmp_path_factory.mktemp("whole")
    return render_pack(parts_inputs, pdf_path=out / "pack.pdf", workers=1)


def test_parts_took_the_parallel_path_and_kept_every_page(parts_pack, whole_pack):
    assert "join" in parts_pack.seconds and "layout" in whole_pack.seconds
    assert parts_pack.n_pages == whole_pack.n_pages == len(pdf_pages_text(parts_pack.pdf_path))
    assert parts_pack.refused == ()


def test_joined_pages_read_like_the_pack_laid_out_whole(parts_pack, whole_pack):
    # Oracle: the same inputs laid out in one WeasyPrint document (its own counters and target-counter()).
    joined, whole = pdf_pages_text(parts_pack.pdf_path), pdf_pages_text(whole_pack.pdf_path)
    for number, (a, b) in enumerate(zip(joined, whole), start=1):
        if "Every family, largest plan value first" in b:
            continue  # that table is printed as text lines in parts; its figures are checked below
        assert squash(a) == squash(b), f"page {number} differs"


def test_joined_page_labels_run_on_without_a_gap(parts_pack):
    pages = pdf_pages_text(parts_pack.pdf_path)
    n = len(pages)
    for number, text in enumerate(pages, start=1):
        if number == 1:
            continue  # the cover has no running footer text beyond the page label
        assert f"Page {number} of {n}" in text, number
    assert f"Page 1 of {n}" in pages[0]


def test_family_runs_and_back_are_laid_out_once(parts_inputs, tmp_path, monkeypatch):
    # Their "Page X of N" is printed over them at the join, so no part waits on another's page count; before,
    # every part was laid out a second time once the counts came in. The front lays out again only to take the
    # page numbers it lists. Counted where each part's HTML is made (in this process, for every worker's part).
    import consensus.pack.render as render

    made = []
    original = render._part_html

    def counting(context, part, numbers):
        made.append((part.part, tuple(f["anchor"] for f in part.families)))
        return original(context, part, numbers)

    monkeypatch.setattr(render, "_part_html", counting)
    pack = render.render_pack(parts_inputs, pdf_path=tmp_path / "pack.pdf", workers=2)
    assert "join" in pack.seconds
    laid_out = [anchor for part, anchors in made if part == "families" for anchor in anchors]
    n_families = parts_inputs.items["family"].nunique()
    assert sorted(laid_out) == sorted(f"family-{i}" for i in range(1, n_families + 1))  # each family once
    assert made.count(("back", ())) == 1
    assert made.count(("front", ())) == 2  # counted, then with its page numbers (this pack's front keeps its length)


def test_family_charts_are_drawn_once_as_the_runs_go_out_and_the_html_matches_the_whole_pack(
        parts_inputs, parts_pack, whole_pack, tmp_path, monkeypatch):
    # The family charts are deferred (charts.DeferredChart): drawn when a run's HTML is made, kept for the HTML
    # file. Oracle: the pack laid out whole, in one process, gives the same HTML byte for byte.
    import consensus.pack.charts as charts

    assert parts_pack.html == whole_pack.html
    drawn = []
    original = charts.FamilyChartPainter.draw

    def counting(self, **kwargs):
        drawn.append(kwargs["salt"])
        return original(self, **kwargs)

    monkeypatch.setattr(charts.FamilyChartPainter, "draw", counting)
    render_pack(parts_inputs, pdf_path=tmp_path / "pack.pdf", html_path=tmp_path / "pack.html", workers=2)
    n_families = parts_inputs.items["family"].nunique()
    assert sorted(drawn) == sorted(f"fam{i}" for i in range(1, n_families + 1))


def test_joined_contents_point_at_the_real_family_pages(parts_inputs, parts_pack):
    pages = pdf_pages_text(parts_pack.pdf_path)
    contents = next(t for t in pages if re.search(r"^Contents$", t, re.M))
    for family in parts_inputs.items["family"].unique():
        listed = re.search(rf"{re.escape(family)}[ .]*?(\d+)\s*$", contents, re.M)
        assert listed, family
        page = pages[int(listed.group(1)) - 1]
        assert re.search(rf"^Family\s+{re.escape(family)}\s*$", page, re.M), family
    by_family = next(t for t in pages if "Every family, largest plan value first" in t)
    for family in parts_inputs.items["family"].unique():
        row = re.search(rf"^{re.escape(family)}\s.*?(\d+)\s*$", by_family, re.M)
        assert row and re.search(rf"^Family\s+{re.escape(family)}\s*$", pages[int(row.group(1)) - 1], re.M)


def test_joined_links_and_bookmarks_resolve(parts_inputs, parts_pack):
    reader = pypdf.PdfReader(str(parts_pack.pdf_path))
    named = reader.named_destinations
    targets = []
    for page in reader.pages:
        for ref in page.get("/Annots", []) or []:
            annotation = ref.get_object()
            if annotation.get("/Subtype") != "/Link" or "/Dest" not in annotation:
                continue
            dest = annotation["/Dest"]
            if isinstance(dest, str):
                assert dest in named, dest
                targets.append(reader.get_destination_page_number(named[dest]))
            else:
                targets.append(reader.get_page_number(dest[0].get_object()))
    texts = pdf_pages_text(parts_pack.pdf_path)
    family_pages = {
        i for i, t in enumerate(texts) for family in parts_inputs.items["family"].unique()
        if re.search(rf"^Family\s+{re.escape(family)}\s*$", t, re.M)
    }
    assert family_pages <= set(targets)  # every family page is reachable from the contents
    outline = reader.outline
    titles = []

    def walk(items):
        for item in items:
            walk(item) if isinstance(item, list) else titles.append(item["/Title"])

    walk(outline)
    for family in parts_inputs.items["family"].unique():
        assert f"Family {family}" in titles


# --------------------------------------------------------------------------- writing the files

PACK_CHILD = """
import sys, time
import weasyprint
from consensus.pack.inputs import example_pack_inputs
from consensus.pack.render import render_pack

whole_pdf = weasyprint.Document.write_pdf

def slow_write_pdf(self, target=None, **options):
    # A slow disk: the finished PDF reaches the file in small pieces, so a kill lands mid-write.
    data = whole_pdf(self, None, **options)
    with open(target, "wb") as handle:
        for start in range(0, len(data), 2048):
            handle.write(data[start:start + 2048])
            handle.flush()
            if start == 2048:
                print("writing", flush=True)
            time.sleep(0.05)

weasyprint.Document.write_pdf = slow_write_pdf
render_pack(example_pack_inputs(), pdf_path=sys.argv[1], html_path=sys.argv[2], workers=1)
print("done", flush=True)
"""


def test_pack_killed_while_writing_leaves_the_previous_pdf_and_html(draft_pack, tmp_path):
    import os
    import signal
    import subprocess
    import sys
    from pathlib import Path

    pdf, html = tmp_path / "pack.pdf", tmp_path / "pack.html"
    pdf.write_bytes(draft_pack.pdf_path.read_bytes())
    html.write_text("<p>last month's pack</p>", encoding="utf-8")
    before = pdf.read_bytes()
    env = {**os.environ, "PYTHONPATH": str(Path(__file__).parent.parent)}
    child = subprocess.Popen([sys.executable, "-c", PACK_CHILD, str(pdf), str(html)], stdout=subprocess.PIPE, env=env)
    assert child.stdout.readline().strip() == b"writing"
    child.send_signal(signal.SIGKILL)
    assert child.wait(timeout=120) == -signal.SIGKILL
    assert pdf.read_bytes() == before  # the previous pack, whole (it was written straight over before)
    assert len(pypdf.PdfReader(str(pdf)).pages) > 0
    assert html.read_text(encoding="utf-8") == "<p>last month's pack</p>"


def test_pack_into_a_folder_or_a_missing_folder_fails_before_any_work(draft_inputs, tmp_path, monkeypatch):
    from consensus.errors import OutputNotWritable
    from consensus.pack import render

    monkeypatch.setattr(render, "build_pack_context", lambda *a, **k: pytest.fail("work started"))
    for options in ({"pdf_path": tmp_path}, {"pdf_path": tmp_path / "no" / "pack.pdf"},
                    {"pdf_path": tmp_path / "pack.pdf", "html_path": tmp_path / "no" / "pack.html"}):
        with pytest.raises(OutputNotWritable):
            render_pack(draft_inputs, **options)
    assert list(tmp_path.iterdir()) == []


def test_a_pack_that_fails_to_render_leaves_the_previous_files(draft_inputs, tmp_path, monkeypatch):
    import weasyprint

    pdf, html = tmp_path / "pack.pdf", tmp_path / "pack.html"
    pdf.write_bytes(b"%PDF-1.7 previous")
    html.write_text("previous", encoding="utf-8")

    def failing_write_pdf(self, target=None, **options):
        with open(target, "wb") as handle:
            handle.write(b"%PDF-1.7 half")
        raise RuntimeError("renderer failed")

    monkeypatch.setattr(weasyprint.Document, "write_pdf", failing_write_pdf)
    with pytest.raises(RuntimeError, match="renderer failed"):
        render_pack(draft_inputs, pdf_path=pdf, html_path=html, workers=1)
    assert pdf.read_bytes() == b"%PDF-1.7 previous" and html.read_text(encoding="utf-8") == "previous"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["pack.html", "pack.pdf"]


def test_end_labels_stay_on_the_chart_and_apart():
    # Common practice for direct labelling: labels keep the lines' order, do not overlap, and stay on the chart.
    # The scorecard chart had six sources ending near its top; pushing each label up ran the top ones off it.
    from consensus.pack.charts import spread_labels

    values = [21.6, 22.3, 23.7, 24.9, 24.9, 25.6]
    placed = spread_labels(values, gap=2.1, floor=0.0, ceiling=28.2)
    assert max(placed) <= 28.2 and min(placed) >= 0.0
    assert all(b - a >= 2.1 - 1e-9 for a, b in zip(placed, placed[1:]))
    assert spread_labels([5.0, 15.0], gap=2.0, floor=0.0, ceiling=30.0) == [5.0, 15.0]  # room: labels at their lines
