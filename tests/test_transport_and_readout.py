"""The transport opens a real pty at the configured line speed; monitor readings need the ADC full
scale a board reported, never a guessed one."""

from __future__ import annotations

import asyncio
import os
import termios
from pathlib import Path

import pytest

from meshwarden.config import load_config
from meshwarden.drivers.rack import Rack
from meshwarden.errors import FaultedRefused
from meshwarden.readout import acquire_monitors
from meshwarden.transport import open_port
from tests.config.minimal import MAIN, write_config


@pytest.mark.parametrize("baud_rate", [9600, 57600, 230400])
def test_the_configured_baud_rate_reaches_the_port(baud_rate: int) -> None:
    """Opened through the transport, a pty's terminal settings carry the configured speed, read
    back with tcgetattr on the port's own descriptor."""
    # Source: POSIX termios - tcgetattr returns [iflag, oflag, cflag, lflag, ispeed, ospeed, cc];
    # the speeds are the B<rate> constants
    main_fd, sub_fd = os.openpty()
    try:
        port = open_port(os.ttyname(sub_fd), timeout_s=0.1, baud_rate=baud_rate)
        try:
            attributes = termios.tcgetattr(port.fileno())
        finally:
            port.close()
    finally:
        os.close(sub_fd)
        os.close(main_fd)
    expected = getattr(termios, f"B{baud_rate}")
    assert (attributes[4], attributes[5]) == (expected, expected)


class _UnusedRack(Rack):
    """A rack that fails the test if anything is read from it."""

    def __init__(self) -> None:
        pass

    async def call(self, *args: object, **kwargs: object) -> object:  # type: ignore[override]
        raise AssertionError("the boards were read although the reading could not be converted")


def test_monitor_watts_are_refused_until_the_board_reports_its_adc_full_scale(tmp_path: Path) -> None:
    """Without the board's identified ADC full scale the read is refused (faulted, naming the
    board), before any board is asked for counts."""
    config = load_config(write_config(tmp_path, MAIN))
    with pytest.raises(FaultedRefused, match="b0: the board has not identified itself") as err:
        asyncio.run(acquire_monitors(_UnusedRack(), config, {}, 1, 1e-3))
    assert err.value.details == {"boards": ["b0"]}


def test_reading_converts_counts_and_takes_out_the_dark_current() -> None:
    """counts / 2^N x full scale / R_f is the photocurrent; (I - I_dark) / responsivity the optical
    power (Source: the photodiode relation I = R P + I_dark, e.g. Saleh & Teich, *Fundamentals of
    Photonics*, photodetector chapter - from memory). 12 bits, 2.5 V, 100 kohm, 0.9 A/W, 5 nA dark:
    2048 counts are 1.25 V, 12.5 uA, (12.5 uA - 5 nA) / 0.9 A/W = 13.8833 uW."""
    from meshwarden.config.model import MonitorConfig, Terminal
    from meshwarden.monitors import reading

    mon = MonitorConfig("m0", Terminal("b0", 0), 0.9, 100_000.0, dark_current_a=5e-9)
    out = reading(2048, mon, 12, 2.5)
    assert out["amps"] == pytest.approx(12.5e-6, rel=1e-12)
    assert out["watts"] == pytest.approx(13.883333e-6, rel=1e-6)
    assert reading(0, mon, 12, 2.5)["watts"] == pytest.approx(-5e-9 / 0.9, rel=1e-12)  # noise is never clipped
