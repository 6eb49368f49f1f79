"""Render the meeting pack to HTML and PDF from the bundled jinja2 templates.

The HTML string is built once and is the very document WeasyPrint lays out, so
screen and print always agree.  Its stylesheet is inlined, so the HTML file
stands alone.  WeasyPrint gets a fetcher that serves only files inside
``reports_dir()`` (and ``data:`` URIs) and records everything it refused: input
text is escaped, so nothing a user typed can make the renderer read a file or
reach the network.
"""

from __future__ import annotations

import base64
import logging
import math
import re
import time
from dataclasses import dataclass, field
from functools import lru_cache
from pathlib import Path
from typing import Any

import jinja2
from markupsafe import Markup

from consensus.pack.context import (
    build_pack_context,
    format_change,
    format_money,
    format_percent,
    format_quantity,
    format_share,
)
from consensus.errors import InvalidSpec
from consensus.pack.inputs import PackInputs
from consensus.resources import reports_dir

LOGGER = logging.getLogger(__name__)
TEMPLATE_NAME = "pack.html.j2"
_TABLE_GAP = re.compile(r">\s+<(/?(?:td|th|tr|thead|tbody|tfoot|table|colgroup|col)\b)")
STYLESHEET_NAME = "pack.css"
#: The pieces a pack can be laid out in: all of it, or front matter, family pages and back matter apart.
PARTS = ("all", "front", "families", "back")


@dataclass(frozen=True)
class RenderedPack:
    """What :func:`render_pack` produced: the HTML text, where files went, and what was fetched or refused."""

    html: str  # the screen HTML (charts inline); the PDF is laid out from the same templates
    pdf_path: Path | None
    html_path: Path | None
    n_pages: int | None
    fetched: tuple[str, ...] = ()
    refused: tuple[str, ...] = ()
    seconds: dict[str, float] = field(default_factory=dict)


# --------------------------------------------------------------------------- templates


def _direction(value: Any) -> str:
    try:
        number = float(value)
    except (TypeError, ValueError):
        return "flat"
    if not math.isfinite(number) or round(number, 1) == 0:
        return "flat"
    return "up" if number > 0 else "down"


def _fixed(digits: int):
    def render(value: Any) -> str:
        try:
            number = float(value)
        except (TypeError, ValueError):
            return "–"
        if not math.isfinite(number):
            return "–"
        return f"{number:,.{digits}f}".replace("-", "\u2212")

    return render


def _signed_one(value: Any) -> str:
    try:
        number = float(value)
    except (TypeError, ValueError):
        return "–"
    return f"{number:+.1f}".replace("-", "\u2212") if math.isfinite(number) else "–"


def _svg_data_uri(svg: str) -> str:
    return "data:image/svg+xml;base64," + base64.b64encode(str(svg).encode("utf-8")).decode("ascii")


@lru_cache(maxsize=1)
def _environment(templates: str) -> jinja2.Environment:
    env = jinja2.Environment(
        loader=jinja2.FileSystemLoader(templates),
        autoescape=True,  # every input string reaches the page as text, never as markup
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
    )
    env.filters.update(
        qty=format_quantity,
        money=format_money,
        chg=lambda value, digits=0: format_change(value, digits=digits),
        pct=format_percent,
        spct=lambda value: format_percent(value, signed=True),
        share=format_share,
        direction=_direction,
        fixed1=_fixed(1),
        fixed2=_fixed(2),
        signed1=_signed_one,
        svg_data_uri=_svg_data_uri,
    )
    return env


def build_html(inputs: PackInputs, **context_options: Any) -> str:
    """The pack as one self-contained HTML document (stylesheet inlined, charts as inline SVG)."""
    context = build_pack_context(inputs, **context_options)
    return _render_context(context, inline_charts=True)


def _render_context(
    context: dict[str, Any],
    *,
    inline_charts: bool,
    part: str = "all",
    families: list[dict] | None = None,
    page_setup: dict[str, int] | None = None,
    page_numbers: dict[str, int] | None = None,
) -> str:
    """Fill the templates; ``inline_charts`` puts SVG in the markup (screen) or in data: images (print).

    ``part`` picks the front matter, a run of family pages (``families``) or
    the back matter, for a pack laid out in parts; ``page_setup`` then gives the
    part's first page number and the pack's page count, and ``page_numbers``
    the page of every anchor the part refers to.
    """
    if part not in PARTS:
        raise InvalidSpec(f"part must be one of {PARTS}, got {part!r}")
    root = reports_dir()
    env = _environment(str(root / "templates"))
    stylesheet = (root / "styles" / STYLESHEET_NAME).read_text(encoding="utf-8")
    html = env.get_template(TEMPLATE_NAME).render(
        **context, stylesheet=Markup(stylesheet), inline_charts=inline_charts, part=part,
        part_families=context["families"] if families is None else families,
        page_setup=page_setup, page_numbers=page_numbers,
    )
    # Whitespace between table tags becomes anonymous boxes in WeasyPrint; drop it.
    return _TABLE_GAP.sub(r"><\1", html)


# --------------------------------------------------------------------------- fetching


def _restricted_fetcher_class():
    from weasyprint.urls import URLFetcher

    class RestrictedFetcher(URLFetcher):
        """Serve only ``data:`` URIs and files under one folder; record and refuse everything else."""

        def __init__(self, allowed_root: Path, **kwargs: Any) -> None:
            super().__init__(allowed_protocols=("file", "data"), allow_redirects=False, timeout=1, **kwargs)
            self.allowed_root = allowed_root.resolve()
            self.fetched: list[str] = []
            self.refused: list[str] = []

        def fetch(self, url, headers=None):  # noqa: D102 - signature fixed by WeasyPrint
            if not self._is_allowed(url):
                self.refused.append(url)
                LOGGER.warning("pack: refused to fetch %s", url)
                raise ValueError(f"the pack loads only its own files; refused {url}")
            # data: URIs are the pack's own charts; keep the log short.
            self.fetched.append(url if not url.startswith("data:") else url[:40] + "…")
            return super().fetch(url, headers)

        def _is_allowed(self, url: str) -> bool:
            from urllib.parse import unquote, urlsplit

            scheme = url.split(":", 1)[0].lower() if ":" in url else ""
            if scheme == "data":
                return True
            if scheme != "file":
                return False
            path = Path(unquote(urlsplit(url).path)).resolve()
            return path == self.allowed_root or self.allowed_root in path.parents

    return RestrictedFetcher


def restricted_fetcher(allowed_root: Path | None = None):
    """A WeasyPrint URL fetcher limited to ``allowed_root`` (default ``reports_dir()``), recording refusals."""
    return _restricted_fetcher_class()(allowed_root or reports_dir())


# --------------------------------------------------------------------------- rendering


def render_pack(
    inputs: PackInputs,
    *,
    pdf_path: str | Path | None = None,
    html_path: str | Path | None = None,
    **context_options: Any,
) -> RenderedPack:
    """Build the pack's HTML and write it to ``html_path`` and/or render it to PDF at ``pdf_path``."""
    seconds: dict[str, float] = {}
    started = time.perf_counter()
    context = build_pack_context(inputs, **context_options)
    seconds["context"] = time.perf_counter() - started

    started = time.perf_counter()
    html = _render_context(context, inline_charts=True)
    seconds["html"] = time.perf_counter() - started

    html_out = None
    if html_path is not None:
        html_out = Path(html_path)
        html_out.write_text(html, encoding="utf-8")

    pdf_out, n_pages, fetched, refused = None, None, (), ()
    if pdf_path is not None:
        import weasyprint

        started = time.perf_counter()
        print_html = _render_context(context, inline_charts=False)
        fetcher = restricted_fetcher()
        document = weasyprint.HTML(
            string=print_html, base_url=str(reports_dir() / "templates") + "/", url_fetcher=fetcher
        ).render()
        seconds["layout"] = time.perf_counter() - started
        started = time.perf_counter()
        pdf_out = Path(pdf_path)
        document.write_pdf(pdf_out)
        seconds["pdf"] = time.perf_counter() - started
        n_pages = len(document.pages)
        fetched, refused = tuple(fetcher.fetched), tuple(fetcher.refused)
    return RenderedPack(
        html=html, pdf_path=pdf_out, html_path=html_out, n_pages=n_pages,
        fetched=fetched, refused=refused, seconds=seconds,
    )
