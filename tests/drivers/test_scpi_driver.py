"""What the SCPI driver adds to the contract: *RST refused by default, the error queue checked
after every write, the instrument's own limit, and the record of codes seen kept honest on a
line without any frame check."""

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
from meshwarden.config import load_config
from meshwarden.config.model import BoardConfig
from meshwarden.drivers import create_driver
from meshwarden.drivers.base import BoardDriver
from meshwarden.drivers.scpi import ScpiDriver
from meshwarden.errors import BoardNakError, MeshwardenError, RefusedError
from tests.drivers.benches import write_driver_bench


@pytest.fixture
def bench(tmp_path: Path) -> Iterator[tuple[BoardConfig, str]]:
    path, rack = write_driver_bench(tmp_path, "scpi")
    yield load_config(path).rack.boards[0], rack
    inprocess.remove(rack)


def opened(board: BoardConfig, ceiling: int = 3000) -> BoardDriver:
    driver = create_driver(board)
    driver.set_ceiling((ceiling,) * 4 + (0,) * (board.outputs - 4))
    driver.open()
    driver.identify()
    return driver


def test_reset_is_refused_by_default_and_sends_nothing(bench: tuple[BoardConfig, str]) -> None:
    """*RST is refused unless allowed; when allowed the power-on bit counts a boot."""
    board, name = bench
    driver = opened(board)
    sim = inprocess.get(name).board("b0")
    try:
        boots = sim.boot_count
        with pytest.raises(RefusedError, match=r"\*RST is refused"):
            driver.reset()
        assert sim.boot_count == boots
    finally:
        driver.close()
    options = dataclasses.replace(board.options, allow_reset=True)
    driver = opened(dataclasses.replace(board, options=options))
    try:
        before = driver.heartbeat().boot_count
        driver.reset()
        time.sleep(0.1)  # the board is deaf while it boots
        assert sim.boot_count == boots + 1
        assert driver.heartbeat().boot_count == before + 1
        assert driver.status().power_on
    finally:
        driver.close()


def test_an_error_after_a_write_is_a_refusal_and_leaves_doubt(bench: tuple[BoardConfig, str]) -> None:
    """A write the instrument refuses (here: powered on, not cleared) raises a BoardNakError, the
    outputs go into doubt, and the whole queue is read so the next write starts clean."""
    board, name = bench
    driver = opened(board)
    try:
        driver.read_codes(0, board.outputs)
        with pytest.raises(BoardNakError, match="output_fault"):
            driver.write_codes(0, (1000,))
        assert isinstance(driver, ScpiDriver) and driver.last_errors[0].number == 102
        assert driver.outputs_seen()[1] is not None
        assert inprocess.get(name).board("b0").codes[0] == 0
        driver.clear_faults()
        assert driver.write_codes(0, (1000,)) == (1000,)
    finally:
        driver.close()


def test_instrument_limit_holds_even_when_the_ceiling_is_bypassed(bench: tuple[BoardConfig, str]) -> None:
    """The ceiling is sent as the instrument's own limit at open, so a value above it is refused
    by the instrument too (-221), whatever reached the line."""
    board, name = bench
    driver = opened(board, ceiling=2000)
    try:
        driver.clear_faults()
        assert isinstance(driver, ScpiDriver)
        line = driver._transact(["OUTP1 ON", "SOUR1:VOLT 5.0", "SYST:ERR?"], 1)  # around the base class
        assert line == ['-221,"Settings conflict"']
        assert inprocess.get(name).board("b0").codes[0] == 0
    finally:
        driver.close()


def test_expect_model_refuses_another_instrument(bench: tuple[BoardConfig, str]) -> None:
    """A board answering *IDN? with another model than configured is refused at identify."""
    board, _ = bench
    options = dataclasses.replace(board.options, expect_model="HVS-999")
    driver = create_driver(dataclasses.replace(board, options=options))
    driver.open()
    try:
        with pytest.raises(MeshwardenError, match=r"reports model 'MW-HVD64-SIM'.*expects 'HVS-999'"):
            driver.identify()
    finally:
        driver.close()


def test_corrupted_line_never_leaves_a_wrong_certain_record(bench: tuple[BoardConfig, str]) -> None:
    """With characters corrupted both ways on the line, every time the driver says it is certain
    of the outputs they are what the board holds, and no output ever passes the limit."""
    board, name = bench
    driver = opened(dataclasses.replace(board, retries=5, error_rate_limit=0.95), ceiling=3000)
    rack: SimRack = inprocess.get(name)
    sim = rack.board("b0")
    driver.clear_faults()
    rack.inject(Fault("corrupt", "b0", 0.15))
    checked = failed = 0
    try:
        for step in range(60):
            codes = tuple((step * 37 + 400 * k) % 3000 for k in range(4))
            try:
                driver.write_codes(0, codes)
            except MeshwardenError:
                failed += 1
            try:
                driver.read_codes(0, board.outputs)
            except MeshwardenError:
                continue
            seen, doubt = driver.outputs_seen()
            if doubt is None:
                assert list(seen) == sim.codes.tolist()
                checked += 1
    finally:
        driver.close()
    assert checked > 10 and failed > 0  # the corruption did reach the driver
    assert max(max(e[3], default=0) for e in sim.write_log) <= 3000


def test_watchdog_ramp_is_seen_through_the_setpoint_queries(bench: tuple[BoardConfig, str]) -> None:
    """When the instrument's watchdog ramps the outputs down, the driver reads what is really out
    and the status reports the trip; clearing keeps the outputs where the ramp left them."""
    board, name = bench
    driver = opened(board)
    try:
        driver.clear_faults()
        driver.configure_watchdog(0.3, "ramp_to_zero")
        assert driver.write_codes(0, (3000, 2000)) == (3000, 2000)
        time.sleep(0.8)  # no traffic: the watchdog trips at 0.3 s and ramps 2.7 V at 20 V/s
        assert driver.status().watchdog_tripped
        assert driver.read_codes(0, 2) == (0, 0)
        driver.clear_faults()
        assert driver.read_codes(0, 2) == (0, 0) and not driver.status().watchdog_tripped
        assert inprocess.get(name).board("b0").codes[:2].tolist() == [0, 0]
    finally:
        driver.close()


def test_a_lost_event_status_response_puts_the_outputs_in_doubt(bench: tuple[BoardConfig, str]) -> None:
    """*ESR? clears what it reads, so when a heartbeat's response is lost a reset may have gone
    unseen: the outputs are in doubt until every one has been read again."""
    board, name = bench
    driver = opened(dataclasses.replace(board, timeout_s=0.05, retries=1, error_rate_limit=0.99))
    try:
        driver.read_codes(0, board.outputs)
        assert driver.outputs_seen()[1] is None
        rack = inprocess.get(name)
        rack.inject(Fault("drop", "b0", 1.0))
        with pytest.raises(MeshwardenError):
            driver.heartbeat()
        rack.inject(Fault("drop", "b0", 0.0))
        driver.heartbeat()
        assert driver.outputs_seen()[1] == "a response that may have reported a power-on was lost"
        driver.read_codes(0, board.outputs)
        assert driver.outputs_seen()[1] is None
    finally:
        driver.close()


def test_write_log_checker_reads_an_output_switched_off(bench: tuple[BoardConfig, str]) -> None:
    """An output switched off by command holds 0 V for the write-log checker, so a ramp from there
    is judged from 0 (and the drop itself is not a step, like a zero all)."""
    from meshwarden.writelog import check_board_log

    board, _ = bench
    config = load_config(Path(board.url.split("config=")[1]))
    lsb = 60.0 / 65536
    step = round(1.5 / lsb)  # within c0's 2 V step limit
    log = [(0.0, "write", 0, (step,)), (0.1, "write", 0, (2 * step,)), (0.2, "output_off", 0, ())]
    assert check_board_log(config, "b0", [*log, (0.3, "write", 0, (step,))]).violations == []
    late = check_board_log(config, "b0", [*log[:2], (0.3, "write", 0, (0,)), (0.4, "write", 0, (2 * step,))])
    assert [v.rule for v in late.violations] == ["2", "2"]  # without the switch-off both are steps
