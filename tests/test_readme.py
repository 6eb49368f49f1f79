"""The README's promises: a job paragraph, a Quick start of exactly two commands, and that the demo one works."""

from __future__ import annotations

import pytest

import pandas as pd

from conftest import readme_commands


def test_quick_start_has_two_commands_demo_then_tests():
    commands = readme_commands()
    assert len(commands) == 2
    assert "pip install" in commands[0] and "consensus demo" in commands[0]
    assert "pip install" in commands[1] and '".[test]"' in commands[1] and "pytest" in commands[1]


@pytest.mark.slow  # the README's demo, run as a user would
def test_demo_command_writes_pack_html_and_consensus(demo_dir):
    for name in ("pack.pdf", "pack.html", "consensus.csv", "components.csv", "consensus.db"):
        assert (demo_dir / name).is_file() and (demo_dir / name).stat().st_size > 0, name
    assert (demo_dir / "pack.pdf").read_bytes()[:5] == b"%PDF-"
    printed = (demo_dir.parent / "stdout.txt").read_text()
    assert str(demo_dir / "pack.pdf") in printed and "rejected" in printed
    export = pd.read_csv(demo_dir / "consensus.csv")
    assert {"item", "location", "period", "consensus", "lower_80", "upper_80", "lower_95", "upper_95",
            "status"} <= set(export.columns)
    assert set(export["status"]) == {"published"}
    assert (export["lower_95"] <= export["lower_80"]).all() and (export["lower_80"] <= export["consensus"]).all()
    assert (export["consensus"] <= export["upper_80"]).all() and (export["upper_80"] <= export["upper_95"]).all()
