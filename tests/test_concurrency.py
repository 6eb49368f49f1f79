"""Writers take turns, on SQLite and on PostgreSQL: concurrent submitters, a submit while the store is held, first use.

Findings of a month end at a real company: on PostgreSQL, 8 submits for the same scope at the same
moment left up to 4 of them "accepted" and their quantities were added up (a DC cell read 207 where
each file said about 100); on SQLite, a submit while a long run held the store crashed with "database
is locked" (8 of 8, nothing recorded).  The submitters here are separate processes (multiprocessing,
forked) released together by a barrier, each running the command line as a user would.
"""

from __future__ import annotations

import multiprocessing
import re
import time

import pandas as pd
import pytest

from small_company import (CRASH, CYCLE, DC_FILES, Said, cli, dc_values, exported, file_values, load_company, ok,
                           plan_numbers, start_child, status_rows, write_variant)

#: The slow tier: it starts many processes and waits for the store's busy timeout (the fast tier is pytest -m 'not slow').
pytestmark = pytest.mark.slow

SUBMITTERS = 8
#: Seconds a child may take to start and import before the barrier gives up (the machine is shared).
START_TIMEOUT_S = 120


def _submit_when_released(barrier, url: str, path: str, name: str, queue) -> None:
    """A submitter: wait for the others, then submit one file through the command line."""
    barrier.wait(timeout=START_TIMEOUT_S)
    said = cli(url, "submit", path, "--cycle", CYCLE, "--source", "dc", "--by", name)
    queue.put((name, said.code, said.out, said.err))


def _command_when_released(barrier, url: str, args: tuple, name: str, queue) -> None:
    barrier.wait(timeout=START_TIMEOUT_S)
    said = cli(url, *args)
    queue.put((name, said.code, said.out, said.err))


def _settings_when_released(barrier, url: str, name: str, queue) -> None:
    barrier.wait(timeout=START_TIMEOUT_S)
    said = cli(url, "settings", "list", "--format", "csv")
    queue.put((name, said.code, said.out, said.err))


class Together:
    """Processes forked to run ``target(barrier, *arguments, queue)``, released at once when the test says so.

    The parent closes its store connections first (a forked child must not share a connection's socket)
    and is one of the barrier's parties, so it can set the scene before the children go.
    """

    def __init__(self, target, argument_lists: list[tuple], *, store_in_use: bool = True):
        from consensus.store.db import get_engine

        if store_in_use:  # (opening it here when it is not would create a new store's schema in the parent)
            for url in {arguments[0] for arguments in argument_lists}:
                get_engine(url).dispose()
        get_engine.cache_clear()
        context = multiprocessing.get_context("fork")
        self.barrier = context.Barrier(len(argument_lists) + 1)
        self.queue = context.Queue()
        self.processes = [context.Process(target=target, args=(self.barrier, *arguments, self.queue))
                          for arguments in argument_lists]
        for process in self.processes:
            process.start()

    def release(self) -> None:
        self.barrier.wait(timeout=START_TIMEOUT_S)

    def results(self) -> list[tuple]:
        found = [self.queue.get(timeout=START_TIMEOUT_S + 180) for _ in self.processes]
        for process in self.processes:
            process.join(timeout=60)
            assert process.exitcode == 0, process
        return found


def _together(target, argument_lists: list[tuple], *, store_in_use: bool = True) -> list[tuple]:
    """Run the targets all released at once; their results."""
    together = Together(target, argument_lists, store_in_use=store_in_use)
    together.release()
    return together.results()


def _accepted_id(out: str) -> int:
    return int(re.search(r"accepted as #(\d+)", out).group(1))


def _versions(tmp_path) -> list:
    """Eight versions of DC-E1's file, each quantity scaled by its own factor (so each is told apart)."""
    return [write_variant(DC_FILES["DC-E1"], tmp_path / f"dc_e1_v{k}.csv", factor=1 + k / 100)
            for k in range(1, SUBMITTERS + 1)]


def test_eight_submitters_of_one_scope_at_once_leave_exactly_one_value_per_cell(store_url, tmp_path):
    load_company(store_url, dc=False)
    versions = _versions(tmp_path)
    results = _together(_submit_when_released, [(store_url, str(p), f"submitter {k}")
                                                for k, p in enumerate(versions, start=1)])
    recorded = {}
    for name, code, out, err in results:
        said = Said(code, out, err)
        assert CRASH not in said.text and "Traceback" not in said.text, (name, said)
        if code == 0:
            recorded[_accepted_id(out)] = name
        else:  # a submit that did not record says why, in one or two plain lines
            assert err.startswith("error: ") and len(err.strip().splitlines()) <= 2, (name, said)
    assert len(recorded) == SUBMITTERS, results  # writers wait for each other: none has a reason to fail

    values = dc_values(store_url)
    assert not values.duplicated(["item", "location", "period"]).any()  # one value per cell, never a sum
    newest = recorded[max(recorded)]  # ids follow the order the store accepted them
    expected = file_values(versions[int(newest.split()[-1]) - 1])
    pd.testing.assert_frame_equal(values.sort_values(["item", "period"], ignore_index=True),
                                  expected.sort_values(["item", "period"], ignore_index=True))

    status = status_rows(store_url)
    e1 = status[(status["source"] == "dc") & (status["scope"] == "location DC-E1")]
    assert e1.loc[e1["state"] == "received", "id"].tolist() == [max(recorded)]
    assert sorted(e1.loc[e1["state"] == "replaced", "id"]) == sorted(set(recorded) - {max(recorded)})
    assert "intact" in ok(store_url, "store", "check").out


def test_eight_first_users_of_a_new_store_at_once_all_find_it_ready(store_url):
    """Found while writing these tests: on PostgreSQL, 7 of 8 processes opening a new store at once failed
    (each tried to create the schema)."""
    results = _together(_settings_when_released, [(store_url, f"user {k}") for k in range(SUBMITTERS)],
                        store_in_use=False)
    for name, code, out, err in results:
        assert code == 0 and "limit.max_quantity" in out, (name, code, out, err)


def _hold_the_store(url: str, held, seconds: float) -> None:
    """Hold the store's write lock as a long write would (``held`` is set once it is taken)."""
    from consensus.store.db import session_scope
    from consensus.store.models import Setting

    with session_scope(url) as session:
        session.merge(Setting(key="company", value="Fernhollow Pumps"))
        session.flush()
        held.set()
        time.sleep(seconds)


def _check_recorded(results) -> dict[int, str]:
    recorded = {}
    for name, code, out, err in results:
        assert code == 0 and "accepted as #" in out and CRASH not in err, (name, code, out, err)
        recorded[_accepted_id(out)] = name
    assert len(recorded) == len(results)
    return recorded


def test_a_submit_while_another_write_holds_the_store_waits_then_records(store_url, tmp_path):
    """Finding: 8 of 8 SQLite submits crashed with "database is locked" while a run held the store."""
    import threading

    load_company(store_url, dc=False)
    together = Together(_submit_when_released, [(store_url, str(p), f"submitter {k}")
                                                for k, p in enumerate(_versions(tmp_path), start=1)])
    held = threading.Event()
    # longer than the five seconds SQLite waits for a lock by default (what the first wave relied on)
    holder = threading.Thread(target=_hold_the_store, args=(store_url, held, 8.0))
    holder.start()
    assert held.wait(timeout=60)
    started = time.monotonic()
    together.release()
    results = together.results()
    waited = time.monotonic() - started
    holder.join()
    _check_recorded(results)
    assert waited > 7.0  # they waited for the holder instead of failing at once
    assert not dc_values(store_url).duplicated(["item", "location", "period"]).any()


@pytest.mark.slow
def test_submits_during_a_run_record_and_a_rerun_gives_the_numbers_of_an_undisturbed_store(store_url, tmp_path):
    """A run reads its inputs, computes with no lock held, then writes in one short transaction."""
    from consensus.store.db import get_engine

    load_company(store_url, dc=False, past=3)
    versions = _versions(tmp_path)
    together = Together(_submit_when_released, [(store_url, str(p), f"submitter {k}")
                                                for k, p in enumerate(versions, start=1)])
    run = start_child(store_url, "run", "--cycle", CYCLE, "--jobs", "1")
    time.sleep(1.0)  # the child is importing or reading; the files arrive while it reads, computes or writes
    together.release()
    recorded = _check_recorded(together.results())
    run_out, run_err = run.communicate(timeout=300)
    assert run.returncode == 0 and CRASH not in run_err, (run_out, run_err)
    arrived = re.search(r"(\d+) file\(s\) arrived while it computed", run_out)
    assert arrived or "Distribution centers" in run_out, run_out  # it read them, or says it did not
    ok(store_url, "run", "--cycle", CYCLE, "--jobs", "1")
    disturbed = exported(store_url, tmp_path)
    assert "intact" in ok(store_url, "store", "check").out

    newest = versions[int(recorded[max(recorded)].split()[-1]) - 1]
    quiet = f"sqlite:///{tmp_path / 'quiet.db'}"
    get_engine.cache_clear()
    load_company(quiet, dc=False, past=3)
    ok(quiet, "submit", newest, "--cycle", CYCLE, "--source", "dc")
    ok(quiet, "run", "--cycle", CYCLE, "--jobs", "1")
    pd.testing.assert_frame_equal(plan_numbers(disturbed), plan_numbers(exported(quiet, tmp_path)))


@pytest.mark.parametrize("late", ["submit", "decide"])
def test_a_late_change_and_publish_at_the_same_moment_never_both_succeed(store_url, tmp_path, late):
    """Finding: a late file replaced the file the published run was built from; decisions recorded after
    publication could never be published.  Whichever is first, the published plan is the run it names."""
    load_company(store_url)
    ok(store_url, "run", "--cycle", CYCLE, "--jobs", "1")
    change = {"submit": ("submit", str(write_variant(DC_FILES["DC-E1"], tmp_path / "late.csv", factor=2)),
                         "--cycle", CYCLE, "--source", "dc"),
              "decide": ("decide", "--cycle", CYCLE, "--family", "PARTS", "--period", "2026-11", "--pct", "5",
                         "--reason", "late", "--by", "R. Tester")}[late]
    results = dict((name, (code, out, err)) for name, code, out, err in _together(
        _command_when_released, [(store_url, change, late), (store_url, ("publish", "--cycle", CYCLE, "--by",
                                                                         "P. Lead"), "publish")]))
    for name, (code, out, err) in results.items():
        assert CRASH not in out + err and (code == 0 or err.startswith("error: ")), (name, code, out, err)
    assert [results[late][0], results["publish"][0]].count(0) == 1, results  # exactly one of them went through
    if results["publish"][0] == 0:
        assert "cycle reopen" in results[late][2]
    else:
        assert "since run #" in results["publish"][2] and f"consensus run --cycle {CYCLE}" in results["publish"][2]
    assert "intact" in ok(store_url, "store", "check").out
