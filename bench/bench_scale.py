"""Scale: cold run, warm run, pack, export, peak memory and store size for N item × location series.

    python3 bench/bench_scale.py                       # N = 1,000, 10,000, 100,000 on SQLite
    python3 bench/bench_scale.py --series 1000 10000   # a quicker look
    python3 bench/bench_scale.py --series 10000 --postgres postgresql+psycopg://postgres@127.0.0.1:55432/scale
    python3 bench/bench_scale.py --series 100000 --keep DIR    # keeps DIR/n100000/built.db (unrun) as well
    python3 bench/bench_scale.py --series 100000 --built DIR   # measures a copy of it again, without the build

Each store is invented (bench/scale_store.py) and loaded through the tool's own
intake: 12 past cycles and the current one, an 18-month horizon, sales at
family × region, DCs at item × location (DC-5 weekly), marketing events, and
the statistical source made by the run.  Every step is the CLI a planner
would type, run as its own process, timed by the wall clock, with its peak
memory sampled from /proc every 0.2 s in two ways: the largest sum of the
resident memory (RSS) of the process and its children, and the largest sum
of their proportional memory (PSS).  RSS counts the pages a forked worker
shares with the run once more for every worker; PSS splits them, so it is
what the machine must actually hold.

* cold run: the first run, so every past cycle's statistical forecast is made from scratch;
* warm run: after one new DC file for the current cycle;
* pack: the meeting pack of the current cycle (executive pages and every family page);
* export: the consensus with its bands to CSV.

Targets (100,000 series, 2 cores, 24 GB): cold run < 10 min, warm run < 2 min,
peak memory < 6 GB, store < 3 GB, pack < 60 s; cost per 1,000 series flat or
falling as N grows; PostgreSQL within 1.5× of SQLite with identical numbers.
"""

from __future__ import annotations

import argparse
import hashlib
import os
import shutil
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))
sys.path.insert(0, str(HERE))

from scale_store import CURRENT, build_store, correction_file, invent_company  # noqa: E402


def _tree_memory(root: int) -> tuple[int, int]:
    """Resident and proportional memory (bytes) of a process and all its descendants.

    RSS counts a page in every process that maps it, so forked workers count the pages they share with the run
    again; PSS (Linux smaps_rollup) splits each shared page among its sharers, so the tree's PSS is the memory the
    machine actually gives it.
    """
    parents: dict[int, int] = {}
    rss: dict[int, int] = {}
    for entry in os.listdir("/proc"):
        if not entry.isdigit():
            continue
        try:
            with open(f"/proc/{entry}/status") as status:
                ppid, resident = None, 0
                for line in status:
                    if line.startswith("PPid:"):
                        ppid = int(line.split()[1])
                    elif line.startswith("VmRSS:"):
                        resident = int(line.split()[1]) * 1024
            parents[int(entry)] = ppid
            rss[int(entry)] = resident
        except (FileNotFoundError, ProcessLookupError, PermissionError):
            continue
    total_rss = total_pss = 0
    for pid, resident in rss.items():
        walk = pid
        while walk and walk != root:
            walk = parents.get(walk)
        if walk == root:
            total_rss += resident
            total_pss += _pss(pid)
    return total_rss, total_pss


def _pss(pid: int) -> int:
    try:
        with open(f"/proc/{pid}/smaps_rollup") as rollup:
            for line in rollup:
                if line.startswith("Pss:"):
                    return int(line.split()[1]) * 1024
    except (FileNotFoundError, ProcessLookupError, PermissionError):
        pass
    return 0


def timed(args: list[str], *, db: str) -> tuple[float, tuple[int, int], str]:
    """Run the CLI as a planner would; (seconds, (peak tree RSS, peak tree PSS) in bytes, output)."""
    command = [sys.executable, "-c", "from consensus.cli import entry; entry()", "--db", db, *args]
    start = time.perf_counter()
    process = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
                               env={**os.environ, "PYTHONPATH": str(HERE.parent)})
    peak = [0, 0]

    def sample():
        while process.poll() is None:
            rss, pss = _tree_memory(process.pid)
            peak[0], peak[1] = max(peak[0], rss), max(peak[1], pss)
            time.sleep(0.2)

    sampler = threading.Thread(target=sample, daemon=True)
    sampler.start()
    output, _ = process.communicate()
    elapsed = time.perf_counter() - start
    sampler.join()
    if process.returncode != 0:
        raise SystemExit(f"'consensus {' '.join(args)}' failed:\n{output[-3000:]}")
    return elapsed, (peak[0], peak[1]), output


def store_bytes(db: str) -> int:
    if db.startswith("sqlite"):
        path = Path(db.split("///", 1)[1])
        return sum(p.stat().st_size for p in path.parent.glob(path.name + "*"))
    import sqlalchemy

    engine = sqlalchemy.create_engine(db)
    with engine.connect() as connection:
        return int(connection.execute(sqlalchemy.text("SELECT pg_database_size(current_database())")).scalar())


def _snapshot(source: Path, target: Path) -> None:
    """A consistent copy of a SQLite store: the backup API copies the pages still in its WAL file too."""
    import sqlite3

    src, dst = sqlite3.connect(source), sqlite3.connect(target)
    try:
        src.backup(dst)
    finally:
        src.close()
        dst.close()


def measure(n: int, db: str, folder: Path, *, log, built: Path | None = None) -> dict:
    """Build the store (or copy ``built``, an unrun SQLite store this script built and kept) and measure."""
    from consensus.store.db import get_engine

    get_engine.cache_clear()
    started = time.perf_counter()
    if built is not None:
        _snapshot(built, Path(db.split("///", 1)[1]))
        company = invent_company(n)  # the same invented company: the scenario is seeded
    else:
        company = build_store(n, db, folder=folder / "files", log=log)
    build = time.perf_counter() - started
    if db.startswith("sqlite"):  # kept unrun, for a later --built (also when this one came from there)
        _snapshot(Path(db.split("///", 1)[1]), folder / "built.db")
    if built is None:
        log(f"  store built in {build:.0f} s")
    cold, cold_rss, _ = timed(["run", "--cycle", CURRENT], db=db)
    log(f"  cold run {cold:.1f} s")
    correction = correction_file(company, folder)
    timed(["submit", str(correction), "--cycle", CURRENT, "--source", "dc", "--by", "bench"], db=db)
    warm, warm_rss, _ = timed(["run", "--cycle", CURRENT], db=db)
    log(f"  warm run {warm:.1f} s")
    pack, pack_rss, pack_out = timed(["pack", "--cycle", CURRENT, "--out", str(folder / "pack.pdf")], db=db)
    log(f"  pack {pack:.1f} s: {pack_out.strip()}")
    export_path = folder / "consensus.csv"
    export, export_rss, _ = timed(["export", "--cycle", CURRENT, "--out", str(export_path)], db=db)
    digest = hashlib.sha256(export_path.read_bytes()).hexdigest()
    return {"series": n, "build_s": build, "copied": built is not None, "cold_s": cold, "warm_s": warm,
            "pack_s": pack, "export_s": export,
            "peak_gb": max(m[0] for m in (cold_rss, warm_rss, pack_rss, export_rss)) / 1e9,
            "peak_pss_gb": max(m[1] for m in (cold_rss, warm_rss, pack_rss, export_rss)) / 1e9,
            "store_mb": store_bytes(db) / 1e6,
            "pages": pack_out.split("(")[-1].split(" ")[0] if "(" in pack_out else "?", "export_sha": digest}


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--series", type=int, nargs="+", default=[1_000, 10_000, 100_000])
    parser.add_argument("--postgres", help="also run each N on this PostgreSQL database URL (emptied first)")
    parser.add_argument("--keep", help="keep the stores in this folder (each N's unrun store too, as built.db)")
    parser.add_argument("--built", help="measure copies of the unrun stores a --keep run left in this folder "
                                        "(FOLDER/nN/built.db) instead of building them again (SQLite only)")
    args = parser.parse_args()
    root = Path(args.keep or tempfile.mkdtemp(prefix="bench_scale_"))
    root.mkdir(parents=True, exist_ok=True)
    log = lambda m: print(m, flush=True)  # noqa: E731
    rows = []
    for n in args.series:
        folder = root / f"n{n}"
        built = None
        if args.built:
            kept = Path(args.built) / f"n{n}" / "built.db"
            if not kept.exists():
                raise SystemExit(f"--built: {kept} does not exist (run once with --keep {args.built})")
            built = Path(tempfile.mkdtemp(prefix="bench_built_")) / "built.db"  # --built may be --keep's folder
            _snapshot(kept, built)
        shutil.rmtree(folder, ignore_errors=True)
        folder.mkdir(parents=True)
        log(f"N = {n:,} series (SQLite)" + (f", store copied from {kept} (built earlier, never run)" if built else ""))
        rows.append({"backend": "sqlite", **measure(n, f"sqlite:///{folder / 'store.db'}", folder, log=log,
                                                     built=built)})
        if built is not None:
            shutil.rmtree(built.parent, ignore_errors=True)
        if args.postgres:
            import sqlalchemy

            engine = sqlalchemy.create_engine(args.postgres)
            with engine.begin() as connection:
                connection.execute(sqlalchemy.text("DROP SCHEMA public CASCADE"))
                connection.execute(sqlalchemy.text("CREATE SCHEMA public"))
            engine.dispose()
            pg_folder = root / f"n{n}_pg"
            shutil.rmtree(pg_folder, ignore_errors=True)
            pg_folder.mkdir(parents=True)
            log(f"N = {n:,} series (PostgreSQL)")
            rows.append({"backend": "postgres", **measure(n, args.postgres, pg_folder, log=log)})
    print()
    header = (f"{'backend':<9} {'series':>8} {'cold run':>9} {'warm run':>9} {'pack':>7} {'pages':>6} "
              f"{'export':>7} {'RSS GB':>7} {'PSS GB':>7} {'store MB':>9} {'per series·cycle':>17} {'cold s/1k':>10}")
    print(header)
    print("-" * len(header))
    for r in rows:
        per = r["store_mb"] * 1e6 / (r["series"] * 13) / 1e3
        print(f"{r['backend']:<9} {r['series']:>8,} {r['cold_s']:>8.1f}s {r['warm_s']:>8.1f}s {r['pack_s']:>6.1f}s "
              f"{r['pages']:>6} {r['export_s']:>6.1f}s {r['peak_gb']:>7.2f} {r['peak_pss_gb']:>7.2f} "
              f"{r['store_mb']:>9.0f} {per:>14.2f} KB {r['cold_s'] / (r['series'] / 1000):>10.2f}")
    for n in args.series:
        pair = [r for r in rows if r["series"] == n]
        if len(pair) == 2:
            same = pair[0]["export_sha"] == pair[1]["export_sha"]
            print(f"N = {n:,}: PostgreSQL / SQLite cold run {pair[1]['cold_s'] / pair[0]['cold_s']:.2f}×, warm run "
                  f"{pair[1]['warm_s'] / pair[0]['warm_s']:.2f}×; exports {'identical' if same else 'DIFFER'}")
    print("\ntargets at 100,000 series: cold < 600 s, warm < 120 s, pack < 60 s, peak < 6 GB, store < 3,000 MB "
          "(≤ 2 KB per series per cycle); peak memory is the tree's RSS (shared pages counted per process) and "
          "PSS (shared pages split: what the machine holds)")
    print("build times (intake, not a target): " + ", ".join(
        f"{r['series']:,}: " + ("copied (--built)" if r["copied"] else f"{r['build_s']:.0f} s") for r in rows))
    return 0


if __name__ == "__main__":
    sys.exit(main())
