"""The benchmark scripts still start: each one's --help imports everything it uses.

A benchmark is run by hand, so nothing else notices when a module it imports
is renamed or an interface it implements changes (common practice: smoke-test
the scripts a closing note tells people to rerun).
"""

from __future__ import annotations

import inspect
import subprocess
import sys
from pathlib import Path

import pytest

BENCH = Path(__file__).resolve().parent.parent / "bench"
SCRIPTS = sorted(p for p in BENCH.glob("bench_*.py"))


def test_there_are_benchmarks():
    assert len(SCRIPTS) >= 10


@pytest.mark.slow
@pytest.mark.parametrize("script", SCRIPTS, ids=[p.stem for p in SCRIPTS])
def test_benchmark_script_starts(script):
    done = subprocess.run([sys.executable, str(script), "--help"], capture_output=True, text=True, timeout=120,
                          cwd=BENCH.parent)
    assert done.returncode == 0, done.stderr[-2000:]
    assert "usage" in done.stdout.lower()


def test_backtest_cache_has_the_run_cache_interface():
    sys.path.insert(0, str(BENCH))
    try:
        from bench_backtest import MemoryCache
    finally:
        sys.path.remove(str(BENCH))
    from consensus.methods.plan import Cache

    for name in ("get", "put"):
        assert inspect.signature(getattr(MemoryCache, name)) == inspect.signature(getattr(Cache, name))
    cache = MemoryCache()
    cache.put("k", kind="statistical", cycle="2026-01", content=b"packed")
    assert cache.get("k") == b"packed" and cache.get("other") is None
