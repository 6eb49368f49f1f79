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
from consensus.pack.charts import SOURCE_STYLES, legend_entries
from consensus.pack.context import build_pack_context, format_change, format_percent, format_quantity
from consensus.pack.inputs import FRAME_COLUMNS, PackInputs, empty_frame, example_pack_inputs
from consensus.pack.render import build_html, render_pack, restricted_fetcher
from consensus.periods import horizon_months
from consensus.resources import reports_dir

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
    summary_pages = [t for t in pdf_pages_text(draft_pack.pdf_path) if "Decisions for this meeting" in t]
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
    summary_page = next(i for i, t in enumerate(pages, start=1) if "Decisions for this meeting" in t)
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
    for section in ("cover", "summary", "exceptions", "by-family", "scorecard", "value-added", "decisions",
                    "components", "methods"):
        assert section in parser.section_ids
    assert sum(1 for s in parser.section_ids if s and s.startswith("family-")) == n_families
    # One chart per family plus the scorecard history and the value-added steps.
    assert parser.svg_count == n_families + 2
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
    dashes = [style[1] for style in SOURCE_STYLES.values()]
    assert len(set(dashes)) == len(dashes)
    entries = legend_entries(list(SOURCE_STYLES))
    assert len({e["css"] for e in entries if e["label"] in SOURCE_STYLES}) == len(SOURCE_STYLES)


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


def test_family_band_is_root_sum_of_squares_of_item_deviations(draft_inputs):
    # Oracle: numpy on the raw rows; independence of item errors, normal approximation.
    context = build_pack_context(draft_inputs, with_charts=False)
    page = context["families"][0]
    rows = draft_inputs.consensus.merge(draft_inputs.items, on="item")
    month = rows[(rows["family"] == page["name"]) & (rows["period"] == page["rows"][0]["period"])]
    upper = month["consensus"].sum() + np.sqrt(((month["upper_80"] - month["consensus"]) ** 2).sum())
    lower = month["consensus"].sum() - np.sqrt(((month["consensus"] - month["lower_80"]) ** 2).sum())
    assert page["rows"][0]["upper_80"] == pytest.approx(upper)
    assert page["rows"][0]["lower_80"] == pytest.approx(max(lower, 0))


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
    assert top[0]["why"].startswith("sales moved ▲")


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
                "fva", "missing", "submissions", "scorecard", "weights")}
    bare = dataclasses.replace(draft_inputs, method_notes={}, **empties)
    pack = render_pack(bare, pdf_path=tmp_path / "bare.pdf")
    text = " ".join(pdf_pages_text(pack.pdf_path))
    assert "No published previous cycle to compare with." in text
    assert "No overrides this cycle." in text
    assert pack.refused == ()


def test_invalid_inputs_raise_typed_errors(draft_inputs):
    with pytest.raises(InvalidSpec):
        dataclasses.replace(draft_inputs, status="final")
    with pytest.raises(InvalidSpec):
        dataclasses.replace(draft_inputs, consensus=draft_inputs.consensus.drop(columns=["upper_95"]))
    with pytest.raises(InvalidSpec):
        build_pack_context(draft_inputs, ts_limit=0)
    assert list(empty_frame("consensus").columns) == list(FRAME_COLUMNS["consensus"])
