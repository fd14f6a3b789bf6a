"""The simulated board's SCPI personality, talked to in plain text as a terminal program would:
IEEE 488.2 common commands, SCPI headers and the error queue as the standards describe them.
Also the interlock contact, in both personalities."""

from __future__ import annotations

from dataclasses import replace

import pytest

from meshsim.clock import ManualClock
from meshsim.faults import FaultSpecError, parse_faults
from meshsim.firmware import BOOT_TIME_S
from meshsim.params import ParamsError, parse_params
from meshsim.rack import SimRack
from meshwarden.protocol import Frame, decode_frame, decode_reply, encode_frame
from meshwarden.protocol import messages as m
from meshwarden.protocol.messages import StatusFlag
from tests.sim.helpers import small_params, small_scenario


@pytest.fixture
def scpi() -> tuple[SimRack, ManualClock]:
    clock = ManualClock()
    rack = SimRack(small_scenario(), replace(small_params(), personality="scpi"), clock)
    clock.advance(BOOT_TIME_S)
    return rack, clock


def ask(rack: SimRack, line: str) -> str:
    """Send one program message; the response line (empty when it has no queries)."""
    replies = rack.exchange("b0", line.encode("ascii") + b"\n")
    return b"".join(r for _, r in replies).decode("ascii").rstrip("\n")


def test_identity_and_power_on_event(scpi: tuple[SimRack, ManualClock]) -> None:
    """*IDN? has four fields; *ESR? shows power-on (bit 7) once, then reads 0."""
    rack, _ = scpi
    # Source: IEEE 488.2-1992 section 10.14 (four fields) and section 11.5.1 (standard event
    # status register: bit 7 power on; reading *ESR? clears it) - the bit number from memory.
    fields = ask(rack, "*IDN?").split(",")
    assert len(fields) == 4 and fields[0] == "MESHSIM" and fields[2] == str(rack.board("b0").serial)
    assert int(ask(rack, "*ESR?")) & 0x80
    assert ask(rack, "*ESR?") == "0"


def test_voltage_output_and_readback_reach_the_firmware(scpi: tuple[SimRack, ManualClock]) -> None:
    """A programmed voltage reaches the output only when the output is on; queries read both back."""
    rack, _ = scpi
    board = rack.board("b0")
    ask(rack, "*CLS")  # clears the power-on flag, as clear faults does
    lsb = 60.0 / 65536
    assert ask(rack, f"SOUR1:VOLT {1000 * lsb:.6f};:SOUR1:VOLT?;:OUTP1?") == f"{1000 * lsb:.6f};0"
    assert board.codes[0] == 0  # output off: 0 V out
    assert ask(rack, "OUTP1 ON;:OUTP1?;:SYST:ERR?") == '1;0,"No error"'
    assert board.codes[0] == 1000 and board.write_log[-1][1:] == ("write", 0, (1000,))
    # long forms and any case are the same header (SCPI 1999 Vol. 1 section 6.2.1, from memory)
    ask(rack, f"source2:voltage:level {2000 * lsb:.6f};:OUTPut2:STATe ON")
    assert board.codes[1] == 2000
    assert ask(rack, "MEAS1:VOLT?").startswith("0.9")  # the output sense: about 0.92 V
    ask(rack, "OUTP1 OFF")
    assert board.codes[0] == 0 and ask(rack, "SOUR1:VOLT?") == f"{1000 * lsb:.6f}"


def test_error_queue_numbers_and_overflow(scpi: tuple[SimRack, ManualClock]) -> None:
    """Errors queue with the standard numbers in order; a full queue ends in -350; an empty one
    answers 0,"No error"."""
    rack, _ = scpi
    ask(rack, "*CLS")
    # Source: SCPI 1999 Vol. 2 ch. 21.8 - -113 undefined header, -222 data out of range,
    # -114 header suffix out of range; when the queue is full its last entry is replaced by
    # -350 "Queue overflow"; 0,"No error" when empty (as instrument manuals quote it).
    ask(rack, "SOUR1:VOLT 99")
    ask(rack, "SOUR99:VOLT 1")
    ask(rack, "BOGUS:THING 1")
    assert ask(rack, "SYST:ERR?") == '-222,"Data out of range"'
    assert ask(rack, "SYST:ERR?") == '-114,"Header suffix out of range"'
    assert ask(rack, "SYST:ERR?") == '-113,"Undefined header"'
    assert ask(rack, "SYST:ERR?") == '0,"No error"'
    assert int(ask(rack, "*ESR?")) & 0x30 == 0x30  # command (bit 5) and execution (bit 4) error bits
    for _ in range(20):
        ask(rack, "SOUR1:VOLT -1")
    entries = [ask(rack, "SYST:ERR?") for _ in range(17)]
    assert entries[:15] == ['-222,"Data out of range"'] * 15
    assert entries[15:] == ['-350,"Queue overflow"', '0,"No error"']


def test_power_on_and_watchdog_refusals_are_device_errors(scpi: tuple[SimRack, ManualClock]) -> None:
    """Before *CLS a raising write is refused like the reference protocol's power-on interlock
    (a positive, device-specific error); *RST reboots the firmware."""
    rack, clock = scpi
    board = rack.board("b0")
    assert ask(rack, "OUTP1 ON;:SOUR1:VOLT 1.0;:SYST:ERR?") == '102,"Powered on; clear status first"'
    assert board.codes[0] == 0
    boots = board.boot_count
    ask(rack, "*RST")
    assert board.boot_count == boots + 1
    clock.advance(BOOT_TIME_S)
    assert int(ask(rack, "*ESR?")) & 0x80 and ask(rack, "OUTP1?") == "0"


def test_interlock_contact_in_both_personalities() -> None:
    """The interlock fault opens the contact for its window; set_interlock forces it; the SCPI
    query and the reference status flag both show it."""
    clock = ManualClock()
    rack = SimRack(small_scenario(), small_params(), clock, parse_faults("interlock:b0@1-2"))
    clock.advance(BOOT_TIME_S)

    def flag() -> bool:
        wire = encode_frame(Frame(1, 7, m.Command.STATUS, b""))
        (_, reply), *_ = rack.exchange("b0", wire)
        frame = decode_frame(reply[:-1])
        status = decode_reply(frame.command, frame.payload)
        assert isinstance(status, m.StatusReply)
        rack.board("b0").last_request = None  # the next status is a new transaction
        return bool(status.flags & StatusFlag.INTERLOCK_OPEN)

    assert not flag()
    clock.advance(1.0)
    assert flag()
    rack.set_interlock("b0", False)
    assert not flag()
    rack.set_interlock("b0", None)
    assert flag()
    clock.advance(1.0)
    assert not flag()
    scpi_rack = SimRack(small_scenario(), replace(small_params(), personality="scpi"), clock)
    clock.advance(BOOT_TIME_S)
    assert ask(scpi_rack, "SYST:INT?") == "0"
    scpi_rack.set_interlock("b0", True)
    assert ask(scpi_rack, "SYST:INTerlock?") == "1"


def test_bad_personality_and_interlock_specs_are_refused() -> None:
    """An unknown personality and an interlock on a missing board are clear errors."""
    with pytest.raises(ParamsError, match=r"simulator\.personality: expected one of reference, scpi"):
        parse_params({"personality": "modbus"})
    with pytest.raises(FaultSpecError, match="no board 'b9'"):
        SimRack(small_scenario(), small_params(), ManualClock(), parse_faults("interlock:b9@1"))
