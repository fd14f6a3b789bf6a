"""Shared test fixtures.

The autouse fixture below checks that no test leaves a thread running behind it: a daemon,
a simulator transport or a board worker that outlives its test would make later tests flaky
and hide shutdown bugs.
"""

from __future__ import annotations

import os
import threading
import time
from collections.abc import Iterator
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]


def route_light_script() -> object:
    """scripts/route_light.py as a module (the example experiment script: its path planning)."""
    import importlib.util

    spec = importlib.util.spec_from_file_location("route_light", REPO / "scripts" / "route_light.py")
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


DEMO_CONFIG = REPO / "config" / "demo.yaml"


def _children() -> set[int]:
    """Process ids of this process's living children (from /proc)."""
    out: set[int] = set()
    for task in Path(f"/proc/{os.getpid()}/task").iterdir():
        try:
            out |= {int(p) for p in (task / "children").read_text().split()}
        except OSError:
            continue
    return out


def _ptys() -> int:
    """How many pseudo-terminal ends this process holds open."""
    count = 0
    for fd in Path("/proc/self/fd").iterdir():
        try:
            target = os.readlink(fd)
        except OSError:
            continue
        count += target.startswith("/dev/pts/") or target == "/dev/ptmx"
    return count


@pytest.fixture(autouse=True)
def nothing_outlives_its_test() -> Iterator[None]:
    """Fail a test that leaves a thread, a child process (daemon, simulator) or a pty behind:
    a leak would make later tests flaky and hide shutdown bugs."""
    threads, children, ptys = set(threading.enumerate()), _children(), _ptys()
    yield
    deadline = time.monotonic() + 3.0
    while True:
        leaked = [
            t.name
            for t in threading.enumerate()
            if t not in threads and t.is_alive() and not t.name.startswith(_LIBRARY_THREADS)
        ]
        orphans = _children() - children
        extra_ptys = _ptys() - ptys
        if not (leaked or orphans or extra_ptys > 0) or time.monotonic() > deadline:
            break
        time.sleep(0.05)
    assert not leaked, f"threads left running: {leaked}"
    assert not orphans, f"child processes left running: {sorted(orphans)}"
    assert extra_ptys <= 0, f"{extra_ptys} pty ends left open"


# Threads that libraries start once per process and keep (not ours to stop).
_LIBRARY_THREADS = ("asyncio_", "ThreadPoolExecutor", "Dummy-", "ZMQbg", "zmq")


@pytest.fixture
def demo_config_path() -> Path:
    return DEMO_CONFIG
