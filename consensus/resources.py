"""Where the bundled templates, styles and sample inputs are.

In a wheel they live inside the package (``consensus/_bundled``); in a source
checkout or editable install they are the top-level ``reports/`` and
``sample_inputs/`` folders.
"""

from __future__ import annotations

from pathlib import Path

_PACKAGE = Path(__file__).resolve().parent


def _bundled(name: str) -> Path:
    inside = _PACKAGE / "_bundled" / name
    if inside.is_dir():
        return inside
    checkout = _PACKAGE.parent / name
    if checkout.is_dir():
        return checkout
    raise FileNotFoundError(f"bundled folder '{name}' not found next to the consensus package")


def reports_dir() -> Path:
    """Folder holding templates/ and styles/ for the pack."""
    return _bundled("reports")


def sample_inputs_dir() -> Path:
    """Folder holding the demo scenario's input files."""
    return _bundled("sample_inputs")
