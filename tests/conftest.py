"""Shared test fixtures.

The autouse fixture below checks that no test leaves a thread running behind it: a daemon,
a simulator transport or a board worker that outlives its test would make later tests flaky
and hide shutdown bugs.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Iterator
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]
DEMO_CONFIG = REPO / "config" / "demo.yaml"


@pytest.fixture(autouse=True)
def no_leaked_threads() -> Iterator[None]:
    """Fail a test that leaves a non-daemon thread of its own running."""
    before = set(threading.enumerate())
    yield
    deadline = time.monotonic() + 2.0
    while True:
        leaked = [t for t in threading.enumerate() if t not in before and t.is_alive() and not t.daemon]
        if not leaked or time.monotonic() > deadline:
            break
        time.sleep(0.02)
    assert not leaked, f"threads left running: {[t.name for t in leaked]}"


@pytest.fixture
def demo_config_path() -> Path:
    return DEMO_CONFIG
