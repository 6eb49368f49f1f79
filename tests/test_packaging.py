"""The wheel carries the pack's templates and the sample inputs, so `pip install .` works from any folder."""

from __future__ import annotations

import pytest

import subprocess
import sys
import zipfile
from pathlib import Path

ROOT = Path(__file__).parent.parent


@pytest.mark.slow  # builds the wheel
def test_wheel_ships_reports_and_sample_inputs(tmp_path):
    done = subprocess.run([sys.executable, "-m", "pip", "wheel", str(ROOT), "--no-deps", "-q", "-w", str(tmp_path)],
                          capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr[-2000:]
    wheel = next(tmp_path.glob("consensus-*.whl"))
    names = set(zipfile.ZipFile(wheel).namelist())
    for path in ROOT.joinpath("reports").rglob("*"):
        if path.is_file():
            assert f"consensus/_bundled/reports/{path.relative_to(ROOT / 'reports').as_posix()}" in names
    for needed in ("manifest.json", "master/items.csv", "history/orders.csv", "current/sales_north.xlsx"):
        assert f"consensus/_bundled/sample_inputs/{needed}" in names
    assert "consensus/cli.py" in names
