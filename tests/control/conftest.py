"""Fixtures for controller tests: a bench configuration on an in-process simulated rack."""

from __future__ import annotations

import asyncio
from collections.abc import Callable, Coroutine, Iterator
from pathlib import Path
from typing import Any, TypeVar

import pytest

import meshsim.urlhandler.protocol_meshsim  # noqa: F401
from meshsim import inprocess
from meshwarden.config import Config, load_config
from tests.control.bench import write_bench

T = TypeVar("T")


def run(coro: Coroutine[Any, Any, T]) -> T:
    return asyncio.run(coro)


@pytest.fixture
def make_bench(tmp_path: Path) -> Iterator[Callable[..., tuple[Config, str]]]:
    """Build bench configs (each on its own simulated rack); racks are forgotten afterwards."""
    made: list[str] = []

    def make(**changes: object) -> tuple[Config, str]:
        folder = tmp_path / f"bench{len(made)}"
        path, rack = write_bench(folder, **changes)
        made.append(rack)
        return load_config(path), rack

    yield make
    for rack in made:
        inprocess.remove(rack)
