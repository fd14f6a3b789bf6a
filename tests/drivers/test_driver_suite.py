"""One driver test suite, run over the in-process URL and over a pty to `meshsim serve` in another
process: the driver cannot tell them apart, and neither can these tests."""

from __future__ import annotations

import dataclasses
import time
from collections.abc import Iterator
from pathlib import Path

import pytest

import meshsim.urlhandler.protocol_meshsim  # noqa: F401
from meshsim import inprocess
from meshwarden.config import load_config
from meshwarden.config.model import BoardConfig
from meshwarden.drivers import create_driver
from meshwarden.drivers.base import BoardDriver
from meshwarden.errors import BoardNakError, LinkError, LinkTimeout, MeshwardenError
from meshwarden.testing import unguarded_driver
from tests.control.bench import write_bench
from tests.sim.test_transports import start_server, stop_server


@pytest.fixture(params=["in-process", "pty-process"])
def board(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[BoardConfig]:
    """The bench board, reached in-process or through a pty served by another process."""
    path, rack = write_bench(tmp_path)
    config = load_config(path).rack.boards[0]
    if request.param == "in-process":
        yield config
        inprocess.remove(rack)
        return
    proc, ports = start_server(tmp_path, "pty", config=path)
    try:
        yield dataclasses.replace(config, url=ports["b0"])
    finally:
        stop_server(proc)


@pytest.fixture
def driver(board: BoardConfig) -> Iterator[BoardDriver]:
    d = unguarded_driver(board)
    d.open()
    d.clear_faults()  # a freshly booted board refuses writes away from zero until then
    yield d
    d.close()


def test_identify_matches_the_configuration(driver: BoardDriver) -> None:
    """The board the driver reaches is the one the configuration describes."""
    identity = driver.identify()
    assert (identity.outputs, identity.monitor_inputs, identity.dac_bits, identity.full_scale_volts) == (
        16,
        8,
        16,
        60.0,
    )


def test_write_read_back_and_sense(driver: BoardDriver) -> None:
    """Written codes are latched, read back, and show at the output sense."""
    assert driver.write_codes(0, (1000, 2000, 0, 0, 3000)) == (1000, 2000, 0, 0, 3000)
    assert driver.read_codes(0, 5) == (1000, 2000, 0, 0, 3000)
    sense = driver.read_sense_volts(0, 2)
    assert sense[0] == pytest.approx(1000 * 60 / 65536, abs=0.01)
    assert sense[1] == pytest.approx(2000 * 60 / 65536, abs=0.01)


def test_monitors_gains_heartbeat_status(driver: BoardDriver) -> None:
    """Gains, monitors, heartbeat, status and watchdog configuration work through the driver."""
    driver.set_monitor_gains(0, (2,) * 8)
    counts = driver.read_monitor_counts(0, 8, 0.002)
    assert len(counts) == 8 and counts[0] > 1000  # light reaches m0 through two bar-state gates
    beat = driver.heartbeat()
    status = driver.status()
    assert status.boot_count == beat.boot_count == 1
    driver.configure_watchdog(30.0, "ramp_to_zero")
    assert driver.status().watchdog_remaining_s > 25


def test_checks_before_the_wire(driver: BoardDriver) -> None:
    """Out-of-range channels and codes are refused by the driver itself; nothing is sent."""
    with pytest.raises(MeshwardenError, match=r"outputs 15\.\.16 out of 0\.\.15"):
        driver.write_codes(15, (1, 2))
    with pytest.raises(MeshwardenError, match="code 70000 outside"):
        driver.write_codes(0, (70000,))


def test_reset_is_seen_through_the_boot_counter(driver: BoardDriver) -> None:
    """After a reset the boot counter has moved on and the outputs are at zero."""
    driver.write_codes(0, (5000,))
    before = driver.heartbeat().boot_count
    driver.reset()
    time.sleep(0.1)  # the board is deaf while it boots
    assert driver.heartbeat().boot_count == before + 1
    assert driver.read_codes(0, 1) == (0,)
    assert driver.status().power_on


def test_board_nak_is_a_typed_error(driver: BoardDriver) -> None:
    """A NAK from the board becomes a BoardNakError naming the reason."""
    with pytest.raises(BoardNakError, match="bad_value"):
        driver.read_monitor_counts(0, 1, 5.0)  # longer than the board's 1 s integration maximum


def test_unreachable_url_is_a_link_error(board: BoardConfig) -> None:
    """A port that does not exist is a LinkError naming it."""
    d = create_driver(dataclasses.replace(board, url="/dev/does-not-exist"))
    with pytest.raises(LinkError, match="cannot open /dev/does-not-exist"):
        d.open()


def test_silence_is_a_timeout_after_the_retries(board: BoardConfig) -> None:
    """A board at another address never answers: the driver gives up after its retries."""
    d = create_driver(dataclasses.replace(board, address=9, timeout_s=0.05, retries=2))
    d.open()
    try:
        with pytest.raises(LinkTimeout, match="failed after 3 attempts"):
            d.heartbeat()
    finally:
        d.close()
