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


def test_backtest_wape_by_lag_splits_the_level_table_by_lag_bucket():
    """bench_backtest's lag table: WAPE % = 100 · Σ|A − F| / Σ A of group totals per cycle and month
    (the bench's own definition, common practice), here on four cells worked by hand."""
    sys.path.insert(0, str(BENCH))
    try:
        from bench_backtest import wape_by_lag
    finally:
        sys.path.remove(str(BENCH))
    import numpy as np
    import pandas as pd

    frame = pd.DataFrame({
        "cycle": "2026-01", "period": ["2026-02", "2026-02", "2026-05", "2026-05"], "lag": [1, 1, 4, 4],
        "lag_bucket": ["1", "1", "4-6", "4-6"], "item": ["A", "B", "A", "B"], "location": "L1", "family": "F",
        "region": "R", "all": "all", "actual": [10.0, 30.0, 20.0, 20.0], "consensus": [12.0, 27.0, 25.0, 20.0],
        "value_dc": [np.nan, 33.0, 18.0, 26.0]})
    table = wape_by_lag(frame, ["dc"]).set_index(["level", "lag bucket"])
    # lag 1, dc has cell B only: item |30 − 33| / 30, consensus on B |30 − 27| / 30
    assert table.loc[("item × location", "1"), "source WAPE"] == 100 * 3 / 30
    assert table.loc[("item × location", "1"), "consensus on its cells"] == 100 * 3 / 30
    # lag 4: both cells; item Σ|e| = 2 + 6 against 40, family total |40 − 44| against 40; consensus 5 + 0, |40 − 45|
    assert np.isclose(table.loc[("item × location", "4-6"), "source WAPE"], 100 * 8 / 40)
    assert np.isclose(table.loc[("family", "4-6"), "source WAPE"], 100 * 4 / 40)
    assert np.isclose(table.loc[("family", "4-6"), "consensus on its cells"], 100 * 5 / 40)
    assert np.isclose(table.loc[("family", "4-6"), "gap"], 100 * (5 - 4) / 40)
