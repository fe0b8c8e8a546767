"""Shared fixtures (keep this file small: helpers live in tests/_*_support.py)."""

from __future__ import annotations

from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="session")
def demo_dir() -> Path:
    """The shipped invented archive, scans_demo/ (regenerate: python -m ocrbench.synth scans_demo --pages 24 --seed 1)."""
    d = ROOT / "scans_demo"
    if not any(d.glob("page_*.json")):
        pytest.fail("scans_demo/ holds no pages: run 'python -m ocrbench.synth scans_demo --pages 24 --seed 1'")
    return d
