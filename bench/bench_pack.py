"""Time and memory of rendering a large meeting pack (200 families, 5,000 items by default).

Run:  python bench/bench_pack.py [--families 200] [--items 5000] [--workers N] [--out /tmp/bench_pack.pdf]
Prints one table: each stage's wall time and the peak resident memory of this process and of the
largest worker process.  ``--workers 1`` measures the one-process path; the default lets
render_pack choose (every core for a pack this size).
Target: the whole render (context + HTML + PDF) under 60 s on 2 cores.
"""

from __future__ import annotations

import argparse
import os
import resource
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from consensus.pack.inputs import example_pack_inputs  # noqa: E402
from consensus.pack.render import render_pack  # noqa: E402

TARGET_SECONDS = 60.0


def peak_rss_mib(who: int = resource.RUSAGE_SELF) -> float:
    """Peak resident set size so far, in MiB (Linux reports KiB); RUSAGE_CHILDREN: the largest finished child."""
    return resource.getrusage(who).ru_maxrss / 1024


def _joiner() -> str:
    try:
        import pikepdf  # noqa: F401
    except ImportError:
        return "pypdf"
    return "pikepdf"


def _pdf_stages(seconds: dict[str, float]) -> list[tuple[str, str]]:
    if "layout" in seconds:  # one process
        return [("WeasyPrint layout", f"{seconds['layout']:6.1f} s"), ("PDF write", f"{seconds.get('pdf', 0):6.1f} s")]
    return [
        ("count front pages (a worker, first)", f"{seconds.get('count', 0):6.1f} s"),
        ("hand the parts out, drawing the family charts (here)", f"{seconds.get('submit', 0):6.1f} s"),
        ("family runs and back laid out once (workers)", f"{seconds.get('parts', 0):6.1f} s"),
        ("front with its page numbers (here); page numbers (worker)", f"{seconds.get('front', 0):6.1f} s"),
        (f"join parts and print page numbers ({_joiner()})", f"{seconds.get('join', 0):6.1f} s"),
    ]


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--families", type=int, default=200)
    parser.add_argument("--items", type=int, default=5000)
    parser.add_argument("--out", default="/tmp/bench_pack.pdf")
    parser.add_argument("--html", default="/tmp/bench_pack.html")
    parser.add_argument("--workers", type=int, default=None, help="processes for the PDF (default: automatic)")
    args = parser.parse_args()

    started = time.perf_counter()
    inputs = example_pack_inputs(n_families=args.families, n_items=args.items, seed=7)
    build_seconds = time.perf_counter() - started
    rss_after_inputs = peak_rss_mib()

    started, cpu_started = time.perf_counter(), time.process_time()
    pack = render_pack(inputs, pdf_path=args.out, html_path=args.html, workers=args.workers)
    render_seconds = time.perf_counter() - started
    render_cpu = time.process_time() - cpu_started
    load = os.getloadavg()[0]

    rows = [
        ("scenario", f"{args.families} families, {args.items:,} items, {len(inputs.consensus):,} consensus rows"),
        ("build inputs (not part of target)", f"{build_seconds:6.1f} s"),
        ("context + charts", f"{pack.seconds.get('context', 0):6.1f} s"),
        ("HTML templates", f"{pack.seconds.get('html', 0):6.1f} s"),
        *_pdf_stages(pack.seconds),
        ("render total", f"{render_seconds:6.1f} s  (target < {TARGET_SECONDS:.0f} s: "
                         f"{'met' if render_seconds < TARGET_SECONDS else 'MISSED'})"),
        ("render CPU time (this process)", f"{render_cpu:6.1f} s"),
        ("load average at end (1 min)", f"{load:6.2f}  (other work on the machine inflates wall time)"),
        ("pages", f"{pack.n_pages}"),
        ("PDF size", f"{Path(args.out).stat().st_size / 2**20:6.1f} MiB"),
        ("HTML size", f"{len(pack.html.encode()) / 2**20:6.1f} MiB"),
        ("peak RSS after inputs", f"{rss_after_inputs:6.0f} MiB"),
        ("peak RSS overall (this process)", f"{peak_rss_mib():6.0f} MiB"),
        ("peak RSS largest worker", f"{peak_rss_mib(resource.RUSAGE_CHILDREN):6.0f} MiB"),
        ("refused fetches", f"{len(pack.refused)}"),
    ]
    width = max(len(name) for name, _ in rows)
    print(f"{'measure'.ljust(width)}  value")
    print(f"{'-' * width}  {'-' * 40}")
    for name, value in rows:
        print(f"{name.ljust(width)}  {value}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
