"""Fixtures for the daemon-as-a-process tests."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest

from tests.control.bench import write_bench
from tests.service.daemon import Daemon, start_daemon


@pytest.fixture
def daemon(tmp_path: Path) -> Iterator[Daemon]:
    """The daemon serving the one-board bench, as a separate process; it must stop cleanly."""
    config, _ = write_bench(tmp_path)
    d = start_daemon(config, tmp_path)
    yield d
    assert d.stop() == 0, d.log.read_text()
    assert "Traceback" not in d.log.read_text()
