"""Lay out the pack with WeasyPrint, whole or in parts on several processes, and join the parts.

A long pack spends nearly all its time in WeasyPrint, which uses one core.  The
renderer can instead cut the pack into parts (front matter, runs of family
pages, back matter), lay each out in its own process and join the PDFs with
pikepdf (or pypdf).  Each part is a complete HTML document; the front matter
prints the page numbers of the anchors it refers to as given.  No part prints its
own "Page X of N": that needs every other part's page count, and waiting for them
meant laying every part out twice.  The parts keep that footer box hidden, and a
document of blank pages that hold only the page numbers is laid out once the
count is known and printed over the joined pages.  Links that cross parts are
recorded here (page, target, rectangle) and added to the joined PDF as link
annotations.

This module imports WeasyPrint and pypdf only, so a worker process starts
without pandas or matplotlib.
"""

from __future__ import annotations

import logging
import time
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any
from urllib.parse import unquote, urlsplit

from consensus.resources import reports_dir

LOGGER = logging.getLogger(__name__)
#: CSS pixels to PDF points (WeasyPrint lays out at 96 px per inch, PDF counts 72 pt per inch).
PX_TO_PT = 0.75


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


# --------------------------------------------------------------------------- laying out one part


@dataclass(frozen=True)
class LaidOutPart:
    """What laying out one part gave: its pages, where its anchors are, and its links to other parts."""

    n_pages: int
    anchors: dict[str, int]  # anchor → 0-based page within the part
    outside_links: tuple[tuple[int, str, tuple[float, float, float, float]], ...]  # page, anchor, PDF rect (pt)
    fetched: tuple[str, ...] = ()
    refused: tuple[str, ...] = ()
    seconds: dict[str, float] = field(default_factory=dict)


class _MissingAnchorFilter(logging.Filter):
    """Silence WeasyPrint's complaint about links into other parts; they are resolved after the join."""

    def filter(self, record: logging.LogRecord) -> bool:
        return not str(record.msg).startswith("No anchor #")


def lay_out(html: str, *, fetcher=None, in_parts: bool = False):
    """WeasyPrint document of ``html`` with the pack's fetcher and base URL (templates folder)."""
    import weasyprint

    fetcher = fetcher or restricted_fetcher()
    quiet = _MissingAnchorFilter() if in_parts else None
    weasy_logger = logging.getLogger("weasyprint")
    if quiet:
        weasy_logger.addFilter(quiet)
    try:
        return weasyprint.HTML(
            string=html, base_url=str(reports_dir() / "templates") + "/", url_fetcher=fetcher
        ).render()
    finally:
        if quiet:
            weasy_logger.removeFilter(quiet)


def describe_part(document) -> tuple[dict[str, int], tuple]:
    """Anchors of a laid-out document by page, and its links to anchors it does not hold (PDF points)."""
    anchors: dict[str, int] = {}
    for number, page in enumerate(document.pages):
        for name in page.anchors:
            anchors.setdefault(name, number)
    outside = []
    for number, page in enumerate(document.pages):
        height_pt = page.height * PX_TO_PT
        for link_type, target, rectangle, _box in page.links:
            if link_type == "internal" and target not in anchors:
                x1, y1, x2, y2 = rectangle
                outside.append((number, target, (x1 * PX_TO_PT, height_pt - y2 * PX_TO_PT,
                                                 x2 * PX_TO_PT, height_pt - y1 * PX_TO_PT)))
    return anchors, tuple(outside)


def lay_out_part(html: str, pdf_path: str | None) -> LaidOutPart:
    """Lay out one part and write it to ``pdf_path`` (``None`` only counts its pages); runs in a worker."""
    seconds = {}
    started = time.perf_counter()
    fetcher = restricted_fetcher()
    document = lay_out(html, fetcher=fetcher, in_parts=True)
    seconds["layout"] = time.perf_counter() - started
    if pdf_path is not None:
        started = time.perf_counter()
        document.write_pdf(pdf_path)
        seconds["pdf"] = time.perf_counter() - started
    anchors, outside = describe_part(document)
    return LaidOutPart(
        n_pages=len(document.pages), anchors=anchors, outside_links=outside,
        fetched=tuple(fetcher.fetched), refused=tuple(fetcher.refused), seconds=seconds,
    )


def warm_up() -> int:
    """Import WeasyPrint in a fresh worker while the parent is still busy, so the first part starts at once."""
    import weasyprint  # noqa: F401

    return 0


# --------------------------------------------------------------------------- joining


def join_parts(paths: list[str], firsts: list[int], parts: list[LaidOutPart], out_path: str | Path, *,
               page_numbers: str | None = None) -> int:
    """Join the parts' PDFs in order and add the links that cross parts; returns the page count.

    ``firsts[k]`` is the 0-based page of the joined PDF where part ``k`` starts.
    Named destinations and outline entries (bookmarks) of every part are kept;
    the later parts' bookmarks go under the first part's top entry, as in a
    pack laid out whole.  ``page_numbers`` is a PDF of as many pages, page ``i``
    of which is printed over joined page ``i`` (the parts' "Page X of N").
    pikepdf (qpdf) joins a 250-page pack in about a second; without it pypdf
    does the same in pure Python, several times slower.
    """
    try:
        import pikepdf  # noqa: F401
    except ImportError:
        return _join_with_pypdf(paths, firsts, parts, out_path, page_numbers)
    return _join_with_pikepdf(paths, firsts, parts, out_path, page_numbers)


def _check_page_numbers(n_numbers: int, n_pages: int) -> None:
    if n_numbers != n_pages:
        raise RuntimeError(f"page numbers for {n_numbers} pages, but the joined pack has {n_pages}")


def _anchor_pages(firsts: list[int], parts: list[LaidOutPart]) -> dict[str, int]:
    where: dict[str, int] = {}
    for first, part in zip(firsts, parts):
        for name, page in part.anchors.items():
            where.setdefault(name, first + page)
    return where


def _cross_part_links(firsts, parts, where: dict[str, int]) -> list[tuple[int, int, tuple]]:
    """Links from one part to an anchor in another, as (page, target page, rect) in the joined PDF."""
    links, unresolved = [], []
    for first, part in zip(firsts, parts):
        for page, target, rect in part.outside_links:
            if target in where:
                links.append((first + page, where[target], rect))
            else:
                unresolved.append(target)
    if unresolved:
        LOGGER.error("pack: %d link(s) to missing anchors, e.g. #%s", len(unresolved), unresolved[0])
    return links


def _join_with_pikepdf(paths, firsts, parts, out_path, page_numbers=None) -> int:
    import pikepdf
    from pikepdf import Array, Dictionary, Name, NameTree

    where = _anchor_pages(firsts, parts)
    out = pikepdf.Pdf.new()
    sources = [pikepdf.open(path) for path in paths]
    names: dict[str, tuple[int, list]] = {}
    outline_parts = []
    for first, source in zip(firsts, sources):
        with warnings.catch_warnings():
            # pikepdf warns that named destinations are not copied: they are rebuilt below.
            warnings.filterwarnings("ignore", message="Copying pages from another Pdf")
            out.pages.extend(source.pages)
        page_index = {page.obj.objgen: i for i, page in enumerate(source.pages)}
        if "/Names" in source.Root and "/Dests" in source.Root.Names:
            for name, dest in NameTree(source.Root.Names.Dests).items():
                if isinstance(dest, Dictionary):
                    dest = dest.D
                names.setdefault(str(name), (first + page_index[dest[0].objgen], list(dest[1:])))
        with source.open_outline() as outline:
            outline_parts.append([_copy_outline_item(item, page_index, first) for item in outline.root])
    tree = NameTree.new(out)
    for name, (page, rest) in names.items():
        tree[name] = Array([out.pages[page].obj, *rest])
    out.Root.Names = Dictionary(Dests=tree.obj)
    for page, target_page, rect in _cross_part_links(firsts, parts, where):
        annotation = out.make_indirect(Dictionary(
            Type=Name.Annot, Subtype=Name.Link, Rect=Array(list(rect)), Border=Array([0, 0, 0]),
            Dest=Array([out.pages[target_page].obj, Name.Fit]),
        ))
        page_obj = out.pages[page].obj
        if "/Annots" not in page_obj:
            page_obj.Annots = Array()
        page_obj.Annots.append(annotation)
    with out.open_outline() as outline:
        first_items = outline_parts[0] if outline_parts else []
        later = [item for items in outline_parts[1:] for item in items]
        if first_items:
            first_items[-1].children.extend(later)
        outline.root.extend(first_items or later)
    info = sources[0].docinfo if sources else None
    if info is not None:
        for key, value in info.items():
            out.docinfo[key] = value
    numbers = pikepdf.open(page_numbers) if page_numbers is not None else None
    if numbers is not None:
        _check_page_numbers(len(numbers.pages), len(out.pages))
        for page, number in zip(out.pages, numbers.pages):
            page.add_overlay(number)  # same page size, so drawn at its own place, unscaled
    out.save(out_path)
    n_pages = len(out.pages)
    for source in [*sources, *([numbers] if numbers is not None else [])]:
        source.close()
    return n_pages


def _copy_outline_item(item, page_index: dict, first: int):
    """An outline entry pointing at the same place in the joined PDF (WeasyPrint writes [page /XYZ x y z])."""
    from pikepdf import OutlineItem

    dest = item.destination
    if dest is not None and len(dest) >= 4 and dest[0].objgen in page_index:
        copy = OutlineItem(item.title, first + page_index[dest[0].objgen], "XYZ",
                           left=float(dest[2]), top=float(dest[3]))
    else:
        copy = OutlineItem(item.title, first)
    copy.children.extend(_copy_outline_item(child, page_index, first) for child in item.children)
    return copy


def _join_with_pypdf(paths, firsts, parts, out_path, page_numbers=None) -> int:
    from pypdf import PdfReader, PdfWriter
    from pypdf.annotations import Link

    where = _anchor_pages(firsts, parts)
    writer = PdfWriter()
    for path in paths:
        writer.append(path)
    if page_numbers is not None:
        numbers = PdfReader(page_numbers)
        _check_page_numbers(len(numbers.pages), len(writer.pages))
        for page, number in zip(writer.pages, numbers.pages):
            page.merge_page(number)
    metadata = PdfReader(paths[0]).metadata if paths else None
    if metadata:
        writer.add_metadata({key: str(value) for key, value in metadata.items()})
    for page, target_page, rect in _cross_part_links(firsts, parts, where):
        writer.add_annotation(page_number=page, annotation=Link(rect=rect, target_page_index=target_page))
    with open(out_path, "wb") as handle:
        writer.write(handle)
    return len(writer.pages)
