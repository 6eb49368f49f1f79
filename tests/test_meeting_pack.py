"""The demo cycle's pack against the store it was made from: totals, every family, the cover's status.

The figures are recomputed here from the exported consensus with pandas (an independent path
from the pack's own context code), then looked for in the text pypdf extracts from the PDF.
"""

from __future__ import annotations

import pandas as pd
import pytest
from pypdf import PdfReader

from consensus import periods
from consensus.store import frames
from consensus.store.db import session_scope

#: The slow tier: it reads the demo store the README's command builds (the fast tier is pytest -m 'not slow').
pytestmark = pytest.mark.slow

CYCLE = "2026-11"


@pytest.fixture(scope="module")
def pack_text(demo_dir) -> list[str]:
    return [page.extract_text() for page in PdfReader(demo_dir / "pack.pdf").pages]


def test_cover_states_published_and_the_company(pack_text, demo_url):
    assert "PUBLISHED" in pack_text[0]
    from consensus.workflow.meeting_pack import company_name

    with session_scope(demo_url) as s:
        assert company_name(s) in pack_text[0]


def test_totals_for_the_next_3_6_12_months_match_the_store(pack_text, demo_dir):
    export = pd.read_csv(demo_dir / "consensus.csv")
    summary = pack_text[2] if "Executive summary" in pack_text[2] else next(t for t in pack_text
                                                                            if "Executive summary" in t)
    for months in (3, 6, 12):
        window = periods.horizon_months(CYCLE, months)
        total = export.loc[export["period"].isin(window), "consensus"].sum()
        assert f"{total:,.0f}" in summary, (months, total)


def test_every_family_has_its_page_with_its_total(pack_text, demo_dir, demo_url):
    export = pd.read_csv(demo_dir / "consensus.csv")
    with session_scope(demo_url) as s:
        items = frames.load_items(s)
    by_family = export.merge(items[["item", "family"]], on="item").groupby("family")["consensus"].sum()
    whole = "\n".join(pack_text)
    for family, total in by_family.items():
        assert any(f"Family {family}" in t.replace("\n", " ") for t in pack_text), f"no page for family {family}"
        assert f"{total:,.0f}" in whole, (family, total)


def test_pack_says_every_number_carries_error(pack_text):
    assert sum("Every forecast carries error" in t for t in pack_text) >= 2
    assert any("80%" in t and "95%" in t for t in pack_text)


def test_decisions_log_lists_the_meeting_decisions(pack_text):
    whole = " ".join(t.replace("\n", " ") for t in pack_text)
    assert "Wren Caldicott" in whole and "Amara Quennell" in whole
