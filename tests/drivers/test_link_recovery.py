"""Link loss and recovery: an unplugged link, delayed replies, and a TCP link that drops and returns."""

from __future__ import annotations

import dataclasses
import time
from collections.abc import Iterator
from pathlib import Path

import pytest

import meshsim.urlhandler.protocol_meshsim  # noqa: F401
from meshsim import inprocess
from meshsim.faults import Fault
from meshsim.rack import SimRack
from meshsim.serve import RackServer
from meshwarden.config import load_config
from meshwarden.config.model import BoardConfig
from meshwarden.errors import LinkError, LinkTimeout
from meshwarden.testing import free_port, unguarded_driver
from tests.control.bench import write_bench


@pytest.fixture
def bench(tmp_path: Path) -> Iterator[tuple[Path, str, BoardConfig]]:
    path, rack = write_bench(tmp_path)
    yield path, rack, load_config(path).rack.boards[0]
    inprocess.remove(rack)


def test_unplugged_link_times_out_then_comes_back(bench: tuple[Path, str, BoardConfig]) -> None:
    """While the link is silent every call times out after its retries; afterwards it works again."""
    _, rack_name, board = bench
    driver = unguarded_driver(dataclasses.replace(board, timeout_s=0.05, retries=1, error_rate_limit=0.99))
    driver.open()
    driver.clear_faults()  # a freshly booted board refuses writes away from zero until then
    try:
        driver.heartbeat()
        rack = inprocess.get(rack_name)
        now = rack.clock.now()
        rack.inject(Fault("unplug", "b0", at_s=now, until_s=now + 0.5))
        with pytest.raises(LinkTimeout):
            driver.heartbeat()
        time.sleep(0.6)
        assert driver.heartbeat().boot_count == 1
    finally:
        driver.close()


def test_delayed_replies_are_waited_for_or_retried(bench: tuple[Path, str, BoardConfig]) -> None:
    """Replies delayed past the timeout are retried with the same sequence number; a late reply
    to the same seq is accepted, stale ones are dropped; writes land exactly."""
    _, rack_name, board = bench
    driver = unguarded_driver(dataclasses.replace(board, timeout_s=0.05, retries=6, error_rate_limit=0.99))
    driver.open()
    driver.clear_faults()  # a freshly booted board refuses writes away from zero until then
    inprocess.get(rack_name).inject(Fault("delay", "*", 0.3, 0.08))
    try:
        for code in range(100, 2100, 100):
            assert driver.write_codes(0, (code,)) == (code,)
            assert driver.read_codes(0, 1) == (code,)
    finally:
        driver.close()
    assert inprocess.get(rack_name).board("b0").writes_executed == 20


def test_tcp_link_lost_and_reconnected_with_backoff(tmp_path: Path) -> None:
    """The serial server goes away and comes back on the same port: calls fail meanwhile, then the
    driver reopens the link by itself and carries on."""
    path, _ = write_bench(tmp_path)
    rack = SimRack.from_config(path)
    port = free_port()
    board = dataclasses.replace(
        load_config(path).rack.boards[0],
        url=f"socket://127.0.0.1:{port}",
        timeout_s=0.1,
        retries=2,
        error_rate_limit=0.99,
    )
    server = RackServer(rack, "tcp", base_port=port).start()
    driver = unguarded_driver(board)
    driver.open()
    driver.clear_faults()  # a freshly booted board refuses writes away from zero until then
    try:
        assert driver.write_codes(0, (1234,)) == (1234,)
        server.stop()
        with pytest.raises(LinkError):
            driver.heartbeat()
        server = RackServer(rack, "tcp", base_port=port).start()
        deadline = time.monotonic() + 10
        while True:
            try:
                assert driver.read_codes(0, 1) == (1234,)
                break
            except LinkError:
                assert time.monotonic() < deadline, "the driver did not reconnect"
    finally:
        driver.close()
        server.stop()
