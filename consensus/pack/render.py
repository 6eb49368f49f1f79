"""Render the meeting pack to HTML and PDF from the bundled jinja2 templates.

Screen HTML and print come from the same templates and context, so they show
the same numbers; print differs only in form: charts ride in data: images, and
the tables repeated on every family page (and the long by-family table of a
pack laid out in parts) are fixed-width text lines, which WeasyPrint lays out
far faster than cells (see :mod:`consensus.pack.textgrid`).  The stylesheet is
inlined, so the HTML file stands alone.  Long packs are laid out in parts on
several processes (see :mod:`consensus.pack.paginate`).  WeasyPrint gets a fetcher that serves only files inside
``reports_dir()`` (and ``data:`` URIs) and records everything it refused: input
text is escaped, so nothing a user typed can make the renderer read a file or
reach the network.

Files are written through :mod:`consensus.outputs`: each to a temporary file
beside its target, renamed into place once complete, so a pack killed while
rendering leaves the previous PDF and HTML as they were, never a truncated
file.  Both paths are checked before any work starts.
"""

from __future__ import annotations

import base64
import logging
import math
import os
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
from consensus.outputs import atomic_target, check_output_path, write_text
from consensus.pack.inputs import PackInputs
from consensus.pack.paginate import LaidOutPart, join_parts, lay_out, lay_out_part, warm_up
from consensus.pack.paginate import restricted_fetcher  # noqa: F401 - part of this module's interface
from consensus.resources import reports_dir

LOGGER = logging.getLogger(__name__)
TEMPLATE_NAME = "pack.html.j2"
PAGE_NUMBERS_TEMPLATE = "page_numbers.html.j2"
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


def _signed_one(value: Any, suffix: str = "") -> str:
    """One decimal with its sign and no arrow ("+6.3", "−4.3%"): a position, not a change for better or worse."""
    try:
        number = float(value)
    except (TypeError, ValueError):
        return "–"
    return f"{number:+.1f}{suffix}".replace("-", "\u2212") if math.isfinite(number) else "–"


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
        signed_pct1=lambda value: _signed_one(value, "%"),
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
    numbered_apart: bool = False,
    page_numbers: dict[str, int] | None = None,
) -> str:
    """Fill the templates; ``inline_charts`` puts SVG in the markup (screen) or in data: images (print).

    ``part`` picks the front matter, a run of family pages (``families``) or
    the back matter, for a pack laid out in parts; ``numbered_apart`` then
    hides the part's own "Page X of N" (printed over the joined PDF instead),
    and ``page_numbers`` gives the page of every anchor the part refers to.
    """
    if part not in PARTS:
        raise InvalidSpec(f"part must be one of {PARTS}, got {part!r}")
    root = reports_dir()
    env = _environment(str(root / "templates"))
    stylesheet = (root / "styles" / STYLESHEET_NAME).read_text(encoding="utf-8")
    html = env.get_template(TEMPLATE_NAME).render(
        **context, stylesheet=Markup(stylesheet), inline_charts=inline_charts, part=part,
        part_families=context["families"] if families is None else families,
        numbered_apart=numbered_apart, page_numbers=page_numbers,
    )
    # Whitespace between table tags becomes anonymous boxes in WeasyPrint; drop it.
    return _TABLE_GAP.sub(r"><\1", html)


# --------------------------------------------------------------------------- rendering


def render_pack(
    inputs: PackInputs,
    *,
    pdf_path: str | Path | None = None,
    html_path: str | Path | None = None,
    workers: int | None = None,
    **context_options: Any,
) -> RenderedPack:
    """Build the pack's HTML and write it to ``html_path`` and/or render it to PDF at ``pdf_path``.

    ``workers`` processes lay the PDF out in parts (see :mod:`consensus.pack.paginate`);
    ``None`` uses every core the process may run on once the pack has at least
    :data:`PARALLEL_MIN_FAMILIES` families, where starting the processes costs
    less than it saves, and one process below that.  Workers are started with
    ``spawn``, which imports the calling script again: a script that renders a
    large pack needs the usual ``if __name__ == "__main__":`` guard.  Should the
    workers fail to start, the pack is laid out in this process instead.

    Both files are written atomically, the PDF first and the HTML once the PDF
    is in place; a path that names a folder, or a folder that does not exist,
    raises :class:`consensus.errors.OutputNotWritable` before any work.
    """
    if workers is not None and int(workers) < 1:
        raise InvalidSpec(f"workers must be at least 1, got {workers!r}")
    for path in (pdf_path, html_path):
        if path is not None:
            check_output_path(path)
    seconds: dict[str, float] = {}
    n_workers = _worker_count(workers, int(inputs.items["family"].nunique())) if pdf_path is not None else 1
    # Workers start (and import WeasyPrint) while this process builds the context.
    pool = _start_pool(n_workers) if n_workers > 1 else None
    try:
        return _render(inputs, pool, pdf_path=pdf_path, html_path=html_path, seconds=seconds,
                       context_options=context_options)
    finally:
        if pool is not None:
            pool.shutdown(wait=True, cancel_futures=True)


def _start_pool(n_workers: int):
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor

    pool = ProcessPoolExecutor(max_workers=n_workers, mp_context=multiprocessing.get_context("spawn"))
    for _ in range(n_workers):
        pool.submit(warm_up)
    return pool


def _render(inputs, pool, *, pdf_path, html_path, seconds, context_options) -> RenderedPack:
    started = time.perf_counter()
    context = build_pack_context(inputs, **context_options)
    seconds["context"] = time.perf_counter() - started

    pdf_out, n_pages, fetched, refused = None, None, (), ()
    if pdf_path is not None:
        pdf_out = Path(pdf_path)
        laid_out = False
        if pool is not None:
            from concurrent.futures.process import BrokenProcessPool

            try:
                with atomic_target(pdf_out) as partial_pdf:
                    n_pages, fetched, refused = _render_pdf_in_parts(context, partial_pdf, pool=pool, seconds=seconds)
                laid_out = True
            except BrokenProcessPool:
                LOGGER.warning("pack: worker processes failed to start; laying the pack out in one process")
        if not laid_out:
            started = time.perf_counter()
            fetcher = restricted_fetcher()
            document = lay_out(_render_context(context, inline_charts=False), fetcher=fetcher)
            seconds["layout"] = time.perf_counter() - started
            started = time.perf_counter()
            with atomic_target(pdf_out) as partial_pdf:
                document.write_pdf(partial_pdf)
            seconds["pdf"] = time.perf_counter() - started
            n_pages = len(document.pages)
            fetched, refused = tuple(fetcher.fetched), tuple(fetcher.refused)

    # After the PDF: the family charts it drew (charts.DeferredChart) serve again here, and a failed PDF
    # leaves the HTML beside it unchanged as well.
    started = time.perf_counter()
    html = _render_context(context, inline_charts=True)
    seconds["html"] = time.perf_counter() - started
    html_out = None
    if html_path is not None:
        html_out = Path(html_path)
        write_text(html, html_out)
    return RenderedPack(
        html=html, pdf_path=pdf_out, html_path=html_out, n_pages=n_pages,
        fetched=fetched, refused=refused, seconds=seconds,
    )


# --------------------------------------------------------------------------- laying out in parts

#: Packs with fewer families are laid out in one process: starting workers would cost more than it saves.
#: Measured on 2 cores with each part laid out once: 12 families 5.5 s in parts against 6.9 s whole (invented
#: scenario), the 20-family 10k bench store 6.2 s against 8.6 s; on a machine busy with other work, parts cost
#: about 1.5 s more CPU (workers start, the front is laid out twice).
PARALLEL_MIN_FAMILIES = 12
#: Family-page parts per worker, so a worker that finishes early takes another part.
PARTS_PER_WORKER = 3
_MAX_ROUNDS = 4


def _worker_count(requested: int | None, n_families: int) -> int:
    if requested is not None:
        return int(requested)
    try:
        cores = len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        cores = os.cpu_count() or 1
    return cores if n_families >= PARALLEL_MIN_FAMILIES and cores > 1 else 1


def _family_runs(n_families: int, workers: int) -> list[tuple[int, int]]:
    """Consecutive runs of family pages, about ``PARTS_PER_WORKER`` per worker."""
    if n_families == 0:
        return []
    size = max(1, math.ceil(n_families / (workers * PARTS_PER_WORKER)))
    return [(start, min(start + size, n_families)) for start in range(0, n_families, size)]


@dataclass
class _Part:
    """One piece of the pack and what laying it out gave."""

    part: str
    families: list[dict]
    path: str
    result: LaidOutPart | None = None


def _render_pdf_in_parts(
    context: dict[str, Any], pdf_out: Path, *, pool, seconds: dict[str, float]
) -> tuple[int, tuple[str, ...], tuple[str, ...]]:
    """Lay the PDF out in parts on the ``pool``'s processes and join them.

    Family runs and the back matter print no page number of their own (their
    "Page X of N" is printed over them at the join), so each is laid out once,
    on the workers, whatever the other parts' lengths.  The back and the front
    matter go first, the front with placeholder numbers of the widest kind, only
    to count its pages and find its anchors; this process meanwhile draws the
    family charts run by run as it hands the runs out.  Once every count is in,
    the front is laid out with the page numbers that follow, again while its own length
    or anchors move (its contents lists every family); then the page-number
    pages are laid out (on a worker, during the front's last layout, for the
    count it should settle at) and everything is joined.
    """
    import tempfile

    families = context["families"]
    workers = pool._max_workers
    started_all = time.perf_counter()
    with tempfile.TemporaryDirectory(prefix="consensus-pack-") as folder:
        front = _Part("front", [], f"{folder}/front.pdf")
        back = _Part("back", [], f"{folder}/back.pdf")
        middle = [_Part("families", families[a:b], f"{folder}/families-{a:05d}.pdf")
                  for a, b in _family_runs(len(families), workers)]
        parts = [front, *middle, back]

        started = time.perf_counter()
        # The back and the front's page count go first: the workers lay them out while this process draws the
        # family runs' charts (each run's HTML draws its own), so no core waits for the whole context.
        futures = [(back, pool.submit(lay_out_part, _part_html(context, back, _NumberedAnchors()), back.path)),
                   (front, pool.submit(lay_out_part, _part_html(context, front, _NumberedAnchors(999)), None))]
        futures += [(part, pool.submit(lay_out_part, _part_html(context, part, _NumberedAnchors()), part.path))
                    for part in middle]
        seconds["submit"] = time.perf_counter() - started
        for part, future in futures:
            part.result = future.result()
        seconds["count"] = front.result.seconds.get("layout", 0.0)
        seconds["parts"] = time.perf_counter() - started

        started = time.perf_counter()
        numbered = None
        for _ in range(_MAX_ROUNDS):
            firsts, total, numbers = _numbering(parts)
            if numbered is None or numbered[0] != total:  # one file per count, so a stale one never overwrites it
                path = f"{folder}/numbers-{total}.pdf"
                numbered = (total, path, pool.submit(lay_out_part, _page_numbers_html(total), path))
            laid_out = lay_out_part(_part_html(context, front, numbers), front.path)
            settled = (laid_out.n_pages, laid_out.anchors) == (front.result.n_pages, front.result.anchors)
            front.result = laid_out
            if settled:
                break
        else:
            raise RuntimeError("pack page numbers did not settle; the front matter keeps changing length")
        numbered[2].result()
        seconds["front"] = time.perf_counter() - started

        started = time.perf_counter()
        firsts, total, _ = _numbering(parts)
        n_pages = join_parts([p.path for p in parts], firsts, [p.result for p in parts], pdf_out,
                             page_numbers=numbered[1])
        seconds["join"] = time.perf_counter() - started
    seconds["layout+pdf"] = time.perf_counter() - started_all
    fetched = tuple(url for p in parts for url in p.result.fetched)
    refused = tuple(url for p in parts for url in p.result.refused)
    return n_pages, fetched, refused


class _NumberedAnchors(dict):
    """Page number of every anchor (``default`` for any anchor when only counting pages)."""

    def __init__(self, default: int | None = None, pages: dict[str, int] | None = None) -> None:
        super().__init__(pages or {})
        self.default = default

    def __missing__(self, anchor: str) -> int:
        if self.default is None:
            raise KeyError(anchor)
        return self.default

    def __bool__(self) -> bool:  # the templates test "are page numbers given", not "are there any yet"
        return True


def _numbering(parts: list[_Part]) -> tuple[list[int], int, _NumberedAnchors]:
    """Where each part starts (0-based), the page count, and the 1-based page of every anchor."""
    firsts, at = [], 0
    for part in parts:
        firsts.append(at)
        at += part.result.n_pages
    pages = {}
    for first, part in zip(firsts, parts):
        for name, page in part.result.anchors.items():
            pages.setdefault(name, first + page + 1)
    return firsts, at, _NumberedAnchors(pages=pages)


def _part_html(context: dict[str, Any], part: _Part, numbers: dict[str, int]) -> str:
    return _render_context(context, inline_charts=False, part=part.part, families=part.families,
                           numbered_apart=True, page_numbers=numbers)


def _page_numbers_html(total: int) -> str:
    """``total`` blank pages holding only "Page X of N", in the pack's page setup and footer face."""
    root = reports_dir()
    stylesheet = (root / "styles" / STYLESHEET_NAME).read_text(encoding="utf-8")
    return _environment(str(root / "templates")).get_template(PAGE_NUMBERS_TEMPLATE).render(
        stylesheet=Markup(stylesheet), total=int(total))
