"""Shared fixtures (keep this file small: helpers live in tests/_*_support.py)."""

from __future__ import annotations

import signal
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]

# A suite started in the background by a non-interactive shell (`cmd &`) inherits SIGINT ignored, and
# every child the tests start would inherit that too: the Ctrl-C tests would then send a signal nobody
# receives. A handled signal is reset to its default in an exec'd child (POSIX), so handle it here.
if signal.getsignal(signal.SIGINT) is signal.SIG_IGN:
    signal.signal(signal.SIGINT, signal.default_int_handler)


@pytest.fixture(scope="session")
def demo_dir() -> Path:
    """The shipped invented archive, scans_demo/ (regenerate: python -m ocrbench.synth scans_demo --pages 24 --seed 1)."""
    d = ROOT / "scans_demo"
    if not any(d.glob("page_*.json")):
        pytest.fail("scans_demo/ holds no pages: run 'python -m ocrbench.synth scans_demo --pages 24 --seed 1'")
    return d
