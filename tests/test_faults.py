"""kill -9 during submit, run and pack, on SQLite and PostgreSQL: after every fault the store is whole.

From the month-end issue: "kill -9 at several points during submit, run and pack … After every fault
the store passes an integrity check, status tells the truth, and a re-run gives the numbers of an
undisturbed store."  Each command runs as a child process started the way the console script starts
(small_company.CLI_CHILD) and is killed with SIGKILL at a point chosen from outside it: at random times
within the time an undisturbed command takes (a fixed seed, so a failure can be replayed), and at
progress points seen from outside — the moment the child holds the store's write lock (SQLite: another
connection cannot begin a write; PostgreSQL: the store's advisory lock is granted to another backend)
and, for the pack, the moment its temporary file appears beside the target.

The undisturbed numbers come from a store that saw the same files and no fault
(the ``reference`` fixture); the PostgreSQL store must give the same numbers to the last digit.
"""

from __future__ import annotations

import hashlib
import shutil
import signal
import sqlite3
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from small_company import (CRASH, CYCLE, DC_FILES, exported, load_company, ok, plan_numbers, start_child,
                           status_rows, write_variant)

pytestmark = pytest.mark.slow

SEED = 20261202
#: The store's advisory lock (consensus.store.db): held by whoever is writing a PostgreSQL store.
ADVISORY_LOCK = 727_001


@dataclass
class Reference:
    """Stores saved as files, and the numbers and pack of the undisturbed store."""

    folder: Path
    loaded: Path  # the company loaded, the DCs' files in
    correction: Path  # the DC-E1 correction the submit faults send
    ran: Path  # ``loaded`` with the correction submitted and a run stored
    numbers: pd.DataFrame  # that run's export
    pack: Path
    pack_pages: int
    submit_s: float  # how long an undisturbed child takes, to draw kill times from
    run_s: float
    pack_s: float


def _timed_child(url: str, *args) -> float:
    started = time.monotonic()
    child = start_child(url, *args)
    out, err = child.communicate(timeout=300)
    assert child.returncode == 0, (out, err)
    return time.monotonic() - started


def _save(url: str, target: Path) -> Path:
    """The SQLite store of ``url`` as one file (its write-ahead log folded in)."""
    from consensus.store.db import get_engine

    get_engine(url).dispose()
    get_engine.cache_clear()
    source = Path(url.removeprefix("sqlite:///"))
    with sqlite3.connect(source) as connection:
        connection.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    shutil.copy(source, target)
    return target


@pytest.fixture(scope="module")
def reference(tmp_path_factory) -> Reference:
    from pypdf import PdfReader

    from consensus.store.db import get_engine

    folder = tmp_path_factory.mktemp("reference")
    url = f"sqlite:///{folder / 'work.db'}"
    get_engine.cache_clear()
    load_company(url, past=2)
    loaded = _save(url, folder / "loaded.db")
    correction = write_variant(DC_FILES["DC-E1"], folder / "dc_e1_correction.csv", factor=1.07)
    submit_s = _timed_child(url, "submit", correction, "--cycle", CYCLE, "--source", "dc")
    run_s = _timed_child(url, "run", "--cycle", CYCLE, "--jobs", "1")
    numbers = exported(url, folder)
    pack_s = _timed_child(url, "pack", "--cycle", CYCLE, "--out", folder / "pack.pdf")
    ran = _save(url, folder / "ran.db")
    return Reference(folder, loaded, correction, ran, numbers, folder / "pack.pdf",
                     len(PdfReader(folder / "pack.pdf").pages), submit_s, run_s, pack_s)


def _copy_store(saved: Path, tmp_path: Path, name: str) -> str:
    from consensus.store.db import get_engine

    target = tmp_path / name
    shutil.copy(saved, target)
    get_engine.cache_clear()
    return f"sqlite:///{target}"


# --------------------------------------------------------------------------- killing at a point


def _writer_active(url: str):
    """A function telling whether some other process holds the store's write lock right now."""
    if url.startswith("sqlite"):
        path = url.removeprefix("sqlite:///")

        def sqlite_busy() -> bool:
            connection = sqlite3.connect(path, timeout=0, isolation_level=None)
            try:
                connection.execute("BEGIN IMMEDIATE")
                connection.execute("ROLLBACK")
                return False
            except sqlite3.OperationalError:  # "database is locked": a writer is inside its transaction
                return True
            finally:
                connection.close()
        return sqlite_busy
    import psycopg
    from sqlalchemy.engine import make_url

    parts = make_url(url)
    connection = psycopg.connect(host=parts.host, port=parts.port, user=parts.username, dbname=parts.database,
                                 autocommit=True)

    def advisory_lock_held() -> bool:
        return connection.execute("SELECT count(*) FROM pg_locks WHERE locktype = 'advisory' AND granted "
                                  "AND objid = %s", (ADVISORY_LOCK,)).fetchone()[0] > 0
    advisory_lock_held.close = connection.close
    return advisory_lock_held


def _kill(child, *, after_s: float | None = None, when=None, limit_s: float = 120.0) -> bool:
    """SIGKILL the child after ``after_s`` seconds or as soon as ``when()`` holds; False if it finished first."""
    started = time.monotonic()
    while child.poll() is None and time.monotonic() - started < limit_s:
        if after_s is not None and time.monotonic() - started >= after_s:
            break
        if when is not None and when():
            break
        time.sleep(0.001)
    if child.poll() is None:
        child.send_signal(signal.SIGKILL)
    child.communicate(timeout=60)
    # The child can finish between the poll and the signal: then it was not killed, and it must have succeeded.
    killed = child.returncode == -signal.SIGKILL
    if not killed:
        assert child.returncode == 0, child.returncode
    return killed


def _kill_points(duration_s: float, count: int, rng) -> list[float]:
    """``count`` kill times spread over an undisturbed command's duration (stratified, so early and late both)."""
    edges = np.linspace(0.0, duration_s, count + 1)
    return [float(rng.uniform(lo, hi)) for lo, hi in zip(edges[:-1], edges[1:])]


# --------------------------------------------------------------------------- what must hold after a fault


def _store_is_whole(url: str) -> None:
    said = ok(url, "store", "check")
    assert "intact" in said.out, said


def _newest_dc_e1(url: str) -> tuple[int, str]:
    from consensus.store import frames
    from consensus.store.db import session_scope

    with session_scope(url, write=False) as session:
        subs = frames.submissions(session, kinds=["forecast"], cycles=[CYCLE])
    e1 = subs[(subs["source"] == "dc") & subs["scope"].eq("location DC-E1")]
    newest = e1.iloc[-1]
    return int(newest["id"]), str(newest["filename"])


def _status_tells_the_truth(url: str, before: pd.DataFrame) -> pd.DataFrame:
    """Status names, for DC-E1, the newest file the store holds for it; the other scopes are as before."""
    after = status_rows(url)
    newest_id, newest_name = _newest_dc_e1(url)
    e1 = after[(after["source"] == "dc") & (after["scope"] == "location DC-E1") & (after["state"] == "received")]
    assert e1[["id", "filename"]].values.tolist() == [[newest_id, newest_name]], after
    others = lambda t: t[t["scope"] != "location DC-E1"].drop(columns="days_late").reset_index(drop=True)  # noqa: E731
    pd.testing.assert_frame_equal(others(after), others(before))
    return after


def _same_numbers(url: str, reference: Reference, folder: Path) -> None:
    ok(url, "run", "--cycle", CYCLE, "--jobs", "1")
    pd.testing.assert_frame_equal(plan_numbers(exported(url, folder)), plan_numbers(reference.numbers),
                                  check_exact=True)


# --------------------------------------------------------------------------- submit


def _submit_trials(url: str, reference: Reference, tmp_path: Path, *, random_kills: int) -> list[bool]:
    """Kill the correction's submit at random times and as it writes; after each, check and submit it again."""
    rng = np.random.default_rng(SEED)
    writing = _writer_active(url)
    points = [dict(after_s=t) for t in _kill_points(reference.submit_s, random_kills, rng)] + [dict(when=writing)]
    killed = []
    try:
        for point in points:
            before = status_rows(url)
            child = start_child(url, "submit", reference.correction, "--cycle", CYCLE, "--source", "dc")
            killed.append(_kill(child, **point))
            _store_is_whole(url)
            _status_tells_the_truth(url, before)
            # the planner's recovery: submit it again; it is recorded now, or was already
            again = ok(url, "submit", reference.correction, "--cycle", CYCLE, "--source", "dc")
            assert "accepted as #" in again.out or "already in force" in again.out, again
            assert _newest_dc_e1(url)[1] == reference.correction.name
    finally:
        getattr(writing, "close", lambda: None)()
    return killed


def test_kill_9_during_submit_on_sqlite(reference, tmp_path):
    url = _copy_store(reference.loaded, tmp_path, "submit.db")
    killed = _submit_trials(url, reference, tmp_path, random_kills=3)
    assert killed[-1], "the child finished before it was seen writing"
    _same_numbers(url, reference, tmp_path)


# --------------------------------------------------------------------------- run


def _run_trials(url: str, reference: Reference, tmp_path: Path, *, random_kills: int) -> list[bool]:
    """Kill runs at random times and as they write their result; after each, the stored plan is whole."""
    rng = np.random.default_rng(SEED + 1)
    writing = _writer_active(url)
    points = [dict(after_s=t) for t in _kill_points(reference.run_s, random_kills, rng)] + [dict(when=writing)]
    killed = []
    try:
        for point in points:
            before_status = status_rows(url)
            before_plan = exported(url, tmp_path)
            child = start_child(url, "run", "--cycle", CYCLE, "--jobs", "1")
            killed.append(_kill(child, **point))
            _store_is_whole(url)
            _status_tells_the_truth(url, before_status)
            after_plan = exported(url, tmp_path)  # the run before, or the new one, whole: never a part
            assert after_plan["run_id"].nunique() == 1
            assert after_plan["run_id"].iloc[0] in (before_plan["run_id"].iloc[0], before_plan["run_id"].iloc[0] + 1)
            pd.testing.assert_frame_equal(plan_numbers(after_plan), plan_numbers(before_plan), check_exact=True)
    finally:
        getattr(writing, "close", lambda: None)()
    return killed


def test_kill_9_during_run_on_sqlite(reference, tmp_path):
    url = _copy_store(reference.ran, tmp_path, "run.db")
    killed = _run_trials(url, reference, tmp_path, random_kills=2)
    assert killed[-1], "the child finished before it was seen writing"
    _same_numbers(url, reference, tmp_path)


@pytest.mark.postgres
@pytest.mark.parametrize("store_url", ["postgres"], indirect=True)  # the SQLite store has its own tests above
def test_kill_9_during_submit_and_run_on_postgres(store_url, reference, tmp_path):
    load_company(store_url, past=2)
    killed = _submit_trials(store_url, reference, tmp_path, random_kills=1)
    assert killed[-1], "the submit finished before it was seen writing"
    ok(store_url, "run", "--cycle", CYCLE, "--jobs", "1")
    killed = _run_trials(store_url, reference, tmp_path, random_kills=1)
    assert killed[-1], "the run finished before it was seen writing"
    _same_numbers(store_url, reference, tmp_path)  # the same numbers as the undisturbed SQLite store


# --------------------------------------------------------------------------- pack


def _sha(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def test_kill_9_during_pack_leaves_the_previous_pack_or_the_new_one_whole(reference, tmp_path):
    """Finding: kill -9 during pack could leave a truncated, unreadable PDF in place of the previous one."""
    from pypdf import PdfReader

    url = _copy_store(reference.ran, tmp_path, "pack.db")
    out = tmp_path / "packs"
    out.mkdir()
    target = out / "pack.pdf"
    previous = b"%PDF-1.4 the previous cycle's pack, complete\n" * 2000
    rng = np.random.default_rng(SEED + 2)
    temporary = lambda: any(p.name.startswith(".pack.pdf.") for p in out.iterdir())  # noqa: E731
    points = [dict(after_s=t) for t in _kill_points(reference.pack_s, 1, rng)] + [dict(when=temporary)]
    killed = []
    for point in points:
        for left in out.iterdir():
            left.unlink()
        target.write_bytes(previous)
        child = start_child(url, "pack", "--cycle", CYCLE, "--out", target)
        killed.append(_kill(child, **point))
        data = target.read_bytes()
        if data != previous:  # the new pack, then: complete and readable, every page there
            assert len(PdfReader(target).pages) == reference.pack_pages
        leftovers = [p.name for p in out.iterdir() if p != target]
        assert all(name.startswith(".pack.pdf.") and name.endswith(".tmp") for name in leftovers), leftovers
    assert killed[-1], "the pack finished before its temporary file was seen"
    _store_is_whole(url)  # a view: it wrote nothing to the store
    said = ok(url, "pack", "--cycle", CYCLE, "--out", target)
    assert CRASH not in said.text and len(PdfReader(target).pages) == reference.pack_pages
