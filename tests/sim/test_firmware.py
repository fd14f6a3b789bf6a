"""The simulated board firmware: commands, unhappy paths, watchdog, reset, faults, determinism."""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np
import pytest
import serial

import meshsim.urlhandler.protocol_meshsim  # noqa: F401  (registers meshsim:// with pyserial)
from meshsim import inprocess
from meshsim.clock import ManualClock
from meshsim.faults import Fault, FaultSpecError, parse_faults
from meshsim.firmware import BOOT_TIME_S
from meshsim.rack import SimRack
from meshsim.scenario import BoardSpec, Scenario
from meshwarden.errors import ProtocolError
from meshwarden.protocol import Frame, decode_frame, decode_reply, encode_frame
from meshwarden.protocol import messages as m
from meshwarden.protocol.messages import NakReason, StatusFlag
from tests.protocol.golden import MEANING, golden_rows
from tests.sim.helpers import BareClient, small_params, small_rack


def exchange(rack: SimRack, message: m.Message, seq: int = 1, address: int = 1) -> m.Message:
    """One request straight into the rack (no transport), decoded reply out."""
    replies = rack.exchange("b0", encode_frame(Frame(address, seq, message.CODE, message.pack())))
    assert len(replies) == 1, replies
    frame = decode_frame(replies[0][1][:-1])
    return decode_reply(frame.command, frame.payload)


@pytest.fixture
def rack() -> SimRack:
    rack, clock = small_rack()
    clock.advance(1.0)
    return rack


def test_golden_requests_are_understood_by_the_firmware() -> None:
    """Every golden request of docs/protocol.md, fed to a simulated 64-output board at the
    example's address, gets an acknowledgement of its command (the simulator side of the check)."""
    rows = golden_rows()
    for name, (address, seq, command, _) in MEANING.items():
        if command & m.REPLY_BIT or command == m.NAK_COMMAND:
            continue
        board = BoardSpec("b0", address=address, outputs=64, monitor_inputs=32)
        rack = SimRack(Scenario((board,), (), (), ()), small_params(lattice=None), ManualClock(1.0))
        rack.boards["b0"].flags &= ~StatusFlag.POWER_ON  # as a host clears it before writing
        replies = rack.exchange("b0", rows[name])
        frame = decode_frame(replies[0][1][:-1])
        assert (frame.address, frame.seq, frame.command) == (address, seq, command | m.REPLY_BIT), name


def test_a_freshly_booted_board_refuses_writes_away_from_zero_until_faults_are_cleared(rack: SimRack) -> None:
    """After a reset (power-on flag set) a write that raises an output - a retransmission from
    before the reset, or a host that has not noticed it - is refused; lowering is allowed, and
    after clear faults writes work again (docs/protocol.md, reason 10)."""
    exchange(rack, m.Reset(), seq=1)
    rack.clock.advance(0.2)  # type: ignore[attr-defined]
    refused = exchange(rack, m.WriteOutputs(0, (1000,)), seq=2)
    assert isinstance(refused, m.Nak) and refused.reason == NakReason.POWERED_ON
    assert exchange(rack, m.WriteOutputs(0, (0,)), seq=3) == m.OutputsReply(0, (0,))
    assert exchange(rack, m.ClearFaults(), seq=4) == m.Ack()
    assert exchange(rack, m.WriteOutputs(0, (1000,)), seq=5) == m.OutputsReply(0, (1000,))
    assert [entry[1] for entry in rack.board("b0").write_log][-3:] == ["boot", "write", "write"]


def test_identify_reports_the_board(rack: SimRack) -> None:
    """Identify reports the board's outputs, inputs, DAC bits, full scale and boot counter."""
    reply = exchange(rack, m.Identify())
    assert isinstance(reply, m.IdentifyReply)
    assert (reply.outputs, reply.monitor_inputs, reply.dac_bits, reply.full_scale_mv) == (8, 4, 16, 60000)
    assert reply.boot_count == 1


def test_write_quantises_and_sense_reads_the_output(rack: SimRack) -> None:
    """Code c gives c * FS / 2^N volts at the output (Kester MT-001 convention) and at the actuator."""
    exchange(rack, m.WriteOutputs(0, (32768, 100)))
    sense = exchange(rack, m.ReadSense(0, 2), seq=2)
    assert isinstance(sense, m.SenseReply)
    assert sense.values[0] * 1e-6 == pytest.approx(30.0, abs=0.01)
    assert sense.values[1] * 1e-6 == pytest.approx(100 * 60 / 65536, abs=0.01)
    assert rack.truth().terminal_volts[0] == pytest.approx(30.0, abs=1e-12)


def test_bad_crc_gets_a_nak_and_the_next_frame_is_served(rack: SimRack) -> None:
    """A frame with a bad CRC gets a checksum NAK, is counted, and the next good frame is served."""
    wire = bytearray(encode_frame(Frame(1, 3, m.Command.IDENTIFY)))
    wire[2] ^= 0x10
    replies = rack.exchange("b0", bytes(wire))
    nak = decode_reply(*_cmd_payload(replies[0][1]))
    assert isinstance(nak, m.Nak) and nak.reason == NakReason.CHECKSUM
    assert isinstance(exchange(rack, m.Heartbeat(), seq=4), m.HeartbeatReply)
    assert rack.board("b0").crc_errors == 1


def _cmd_payload(wire: bytes) -> tuple[int, bytes]:
    frame = decode_frame(wire[:-1])
    return frame.command, frame.payload


@pytest.mark.parametrize(
    ("message", "reason"),
    [
        (m.WriteOutputs(7, (1, 2)), NakReason.BAD_CHANNEL),
        (m.ReadOutputs(0, 9), NakReason.BAD_CHANNEL),
        (m.ReadMonitors(0, 4, 0), NakReason.BAD_VALUE),
        (m.SetMonitorGain(0, (9,)), NakReason.BAD_VALUE),
        (m.ConfigureWatchdog(0, 2), NakReason.BAD_VALUE),
    ],
)
def test_invalid_requests_get_typed_naks_and_change_nothing(
    rack: SimRack, message: m.Message, reason: NakReason
) -> None:
    """Out-of-range channels and values get typed NAKs and leave the outputs as they were."""
    before = rack.board("b0").codes.copy()
    reply = exchange(rack, message)
    assert isinstance(reply, m.Nak) and reply.reason == reason
    assert (rack.board("b0").codes == before).all()


def test_unknown_command_and_bad_length(rack: SimRack) -> None:
    """An unknown command and a payload of the wrong length get their own NAK reasons."""
    replies = rack.exchange("b0", encode_frame(Frame(1, 1, 0x42, b"")))
    assert decode_reply(*_cmd_payload(replies[0][1])) == m.Nak(0x42, NakReason.UNKNOWN_COMMAND, 0)
    replies = rack.exchange("b0", encode_frame(Frame(1, 2, m.Command.WRITE_OUTPUTS, b"\x00\x00\x01")))
    assert decode_reply(*_cmd_payload(replies[0][1])) == m.Nak(0x02, NakReason.BAD_LENGTH, 3)


def test_repeated_sequence_number_is_answered_without_executing_again(rack: SimRack) -> None:
    """A retransmission (same seq, same frame) gets the stored reply; the write runs once."""
    first = exchange(rack, m.WriteOutputs(0, (500,)), seq=9)
    again = exchange(rack, m.WriteOutputs(0, (500,)), seq=9)
    assert first == again
    assert rack.board("b0").writes_executed == 1
    exchange(rack, m.WriteOutputs(0, (500,)), seq=10)
    assert rack.board("b0").writes_executed == 2


def test_frames_for_another_address_are_ignored(rack: SimRack) -> None:
    """A board stays silent to frames addressed to another board."""
    assert rack.exchange("b0", encode_frame(Frame(7, 1, m.Command.ZERO_ALL))) == []


def test_watchdog_ramp_to_zero() -> None:
    """Without frames for longer than the timeout the board trips, ramps down at its own rate,
    refuses writes away from zero until faults are cleared."""
    rack, clock = small_rack()
    clock.advance(1.0)
    exchange(rack, m.ConfigureWatchdog(2000, m.WatchdogAction.RAMP_TO_ZERO))
    exchange(rack, m.WriteOutputs(0, (43690,)), seq=2)  # 40 V
    clock.advance(2.5)
    rack.tick()
    ramp = rack.board("b0").params.watchdog_ramp_volts_per_s
    assert rack.truth().terminal_volts[0] == pytest.approx(40.0 - 0.5 * ramp, abs=0.01)
    status = exchange(rack, m.Status(), seq=3)
    assert isinstance(status, m.StatusReply)
    assert status.flags & StatusFlag.WATCHDOG_TRIPPED and status.flags & StatusFlag.RAMPING
    refused = exchange(rack, m.WriteOutputs(0, (50000,)), seq=4)
    assert isinstance(refused, m.Nak) and refused.reason == NakReason.WATCHDOG_TRIPPED
    clock.advance(5.0)
    rack.tick()
    assert rack.truth().terminal_volts[0] == 0.0
    exchange(rack, m.ClearFaults(), seq=5)
    assert isinstance(exchange(rack, m.WriteOutputs(0, (100,)), seq=6), m.OutputsReply)


def test_watchdog_hold_keeps_outputs() -> None:
    """With the hold action a tripped watchdog leaves the outputs where they were."""
    rack, clock = small_rack()
    clock.advance(1.0)
    exchange(rack, m.ConfigureWatchdog(1000, m.WatchdogAction.HOLD))
    exchange(rack, m.WriteOutputs(0, (32768,)), seq=2)
    clock.advance(60.0)
    rack.tick()
    assert rack.truth().terminal_volts[0] == pytest.approx(30.0)
    status = exchange(rack, m.Status(), seq=3)
    assert isinstance(status, m.StatusReply) and status.flags & StatusFlag.WATCHDOG_TRIPPED


def test_heartbeats_keep_the_watchdog_quiet() -> None:
    """Regular heartbeats keep the watchdog from tripping."""
    rack, clock = small_rack()
    clock.advance(1.0)
    exchange(rack, m.ConfigureWatchdog(1000, m.WatchdogAction.RAMP_TO_ZERO))
    exchange(rack, m.WriteOutputs(0, (32768,)), seq=2)
    for seq in range(3, 30):
        clock.advance(0.5)
        exchange(rack, m.Heartbeat(), seq=seq)
    status = exchange(rack, m.Status(), seq=31)
    assert isinstance(status, m.StatusReply) and not status.flags & StatusFlag.WATCHDOG_TRIPPED
    assert rack.truth().terminal_volts[0] == pytest.approx(30.0)


def test_reset_zeroes_outputs_and_counts_the_boot(rack: SimRack) -> None:
    """A reset zeroes the outputs, bumps the boot counter, sets power-on and deafens the link while booting."""
    exchange(rack, m.WriteOutputs(0, (32768,)))
    assert isinstance(exchange(rack, m.Reset(), seq=2), m.Ack)
    assert rack.truth().terminal_volts[0] == 0.0
    assert rack.exchange("b0", encode_frame(Frame(1, 3, m.Command.IDENTIFY))) == []  # still booting
    clock = rack.clock
    assert isinstance(clock, ManualClock)
    clock.advance(BOOT_TIME_S * 2)
    reply = exchange(rack, m.Status(), seq=4)
    assert isinstance(reply, m.StatusReply)
    assert reply.boot_count == 2 and reply.flags & StatusFlag.POWER_ON


def test_scheduled_brown_out() -> None:
    """A reset fault scheduled in simulated time happens on its own."""
    rack, clock = small_rack()
    rack.inject(parse_faults("reset:b0@5")[0])
    clock.advance(1.0)
    exchange(rack, m.WriteOutputs(0, (32768,)))
    clock.advance(5.0)
    rack.tick()
    assert rack.board("b0").boot_count == 2
    assert rack.truth().terminal_volts[0] == 0.0


def test_open_wire_sense_reads_command_but_actuator_sees_nothing(rack: SimRack) -> None:
    """An open wire: the board's sense shows the command, the actuator sees 0 V (a chip fault, not a driver fault)."""
    rack.inject(Fault("open_wire", "c0"))
    exchange(rack, m.WriteOutputs(0, (32768,)))
    sense = exchange(rack, m.ReadSense(0, 1), seq=2)
    assert isinstance(sense, m.SenseReply) and sense.values[0] * 1e-6 == pytest.approx(30.0, abs=0.01)
    assert rack.truth().terminal_volts[0] == 0.0


def test_dead_channel_and_short(rack: SimRack) -> None:
    """A dead channel senses 0 V; a shorted one sags and raises the output-fault flag (driver faults)."""
    rack.inject(Fault("dead_channel", "b0:0"))
    rack.inject(Fault("short", "b0:1", 0.6))
    exchange(rack, m.WriteOutputs(0, (32768, 32768)))
    sense = exchange(rack, m.ReadSense(0, 2), seq=2)
    assert isinstance(sense, m.SenseReply)
    assert sense.values[0] * 1e-6 == pytest.approx(0.0, abs=0.01)
    assert sense.values[1] * 1e-6 == pytest.approx(18.0, abs=0.01)
    status = exchange(rack, m.Status(), seq=3)
    assert isinstance(status, m.StatusReply) and status.flags & StatusFlag.OUTPUT_FAULT


def test_stuck_actuator_does_not_move(rack: SimRack) -> None:
    """A stuck actuator does not move whatever it is driven with."""
    rack.inject(Fault("stuck", "p0"))
    before = rack.truth().displacement_m[1]
    exchange(rack, m.WriteOutputs(1, (43690,)))
    assert rack.truth().displacement_m[1] == before


def test_monitor_faults(rack: SimRack) -> None:
    """A dead monitor reads only its dark level; a saturated one reads the top code."""
    exchange(rack, m.SetMonitorGain(0, (2, 2)))
    exchange(rack, m.WriteOutputs(0, (40000, 0, 40000, 0)), seq=2)
    rack.inject(Fault("dead_monitor", "m0"))
    rack.inject(Fault("saturated_monitor", "m1"))
    reply = exchange(rack, m.ReadMonitors(0, 2, 1000), seq=3)
    assert isinstance(reply, m.MonitorsReply)
    assert reply.counts[0] < 50  # dark level only (5 nA x 100 kOhm = 13 counts)
    assert reply.counts[1] == 65535


def test_monitor_read_takes_its_integration_time(rack: SimRack) -> None:
    """A monitor reply is ready only after the requested integration time."""
    replies = rack.exchange("b0", encode_frame(Frame(1, 1, m.Command.READ_MONITORS, m.ReadMonitors(0, 2, 5000).pack())))
    assert replies[0][0] == pytest.approx(rack.clock.now() + 0.005)


def test_charging_drifts_the_effective_voltage_and_relaxes() -> None:
    """Under a sustained bias the effective voltage falls toward (1 - fraction) V with the device's
    time constant; with the bias removed it relaxes back (first-order charging model)."""
    rack, clock = small_rack()
    clock.advance(1.0)
    exchange(rack, m.WriteOutputs(0, (32768,)))
    tau = rack.params.coupler.charging_time_s
    fraction = rack.params.coupler.charging_fraction
    clock.advance(tau)
    shift = 30.0 - float(rack.truth().effective_volts[0])
    assert shift == pytest.approx(fraction * 30.0 * (1 - np.exp(-1.0)), rel=1e-3)
    exchange(rack, m.WriteOutputs(0, (0,)), seq=2)
    clock.advance(5 * tau)
    assert abs(float(rack.truth().effective_volts[0])) < 0.01 * shift


def test_same_seed_same_run_and_another_seed_another_chip() -> None:
    """Every random draw is seeded: the same seed gives identical monitor counts."""

    def run(seed: int) -> list[tuple[int, ...]]:
        rack, clock = small_rack(seed=seed)
        clock.advance(1.0)
        exchange(rack, m.SetMonitorGain(0, (2, 2)))
        exchange(rack, m.WriteOutputs(0, (30000, 20000, 30000, 0)), seq=2)
        out = []
        for seq in range(3, 8):
            reply = exchange(rack, m.ReadMonitors(0, 2, 1), seq=seq)
            assert isinstance(reply, m.MonitorsReply)
            out.append(reply.counts)
        return out

    assert run(5) == run(5)
    assert run(5) != run(6)


def test_fault_spec_errors_are_specific() -> None:
    """Bad fault specs name the item and what was expected."""
    with pytest.raises(FaultSpecError, match="unknown fault kind 'melt'"):
        parse_faults("melt:c0")
    with pytest.raises(FaultSpecError, match="needs a time"):
        parse_faults("reset:b0")
    with pytest.raises(FaultSpecError, match="between 0 and 1"):
        parse_faults("corrupt:*=3")
    rack, _ = small_rack()
    with pytest.raises(FaultSpecError, match="no actuator 'zz'"):
        rack.inject(Fault("stuck", "zz"))


@pytest.fixture
def url_rack() -> Iterator[SimRack]:
    rack, clock = small_rack()
    clock.advance(1.0)
    inprocess.register("unit", rack)
    yield rack
    inprocess.remove("unit")


def test_link_faults_never_apply_a_wrong_code(url_rack: SimRack) -> None:
    """Under corruption, loss, repetition, garbage and wrong addresses, a retrying client gets
    correct replies and the board only ever latches codes the client sent."""
    for kind in ("corrupt", "drop", "repeat", "garbage", "wrong_address"):
        url_rack.inject(Fault(kind, "*", 0.15))
    port = serial.serial_for_url("meshsim://unit/b0", timeout=0.05)
    client = BareClient(port)
    sent = set()
    try:
        for i in range(60):
            code = 1000 + 37 * i
            sent.add(code)
            seq = (i % 250) + 1
            for _attempt in range(30):
                try:
                    reply = client.request(m.WriteOutputs(0, (code,)), seq=seq, timeout=0.05)
                except (TimeoutError, ProtocolError):
                    continue
                if isinstance(reply, m.OutputsReply):
                    assert reply.values == (code,)
                    break
            latched = int(url_rack.board("b0").codes[0])
            assert latched in sent
    finally:
        port.close()


def test_in_process_url_is_exclusive_and_reports_bad_urls(url_rack: SimRack) -> None:
    """An in-process board opens once at a time, and bad URLs say what is wrong."""
    port = serial.serial_for_url("meshsim://unit/b0", timeout=0.1)
    try:
        with pytest.raises(serial.SerialException, match="already open"):
            serial.serial_for_url("meshsim://unit/b0")
        with pytest.raises(serial.SerialException, match="no board 'b9'"):
            serial.serial_for_url("meshsim://unit/b9")
        with pytest.raises(serial.SerialException, match="gives no config"):
            serial.serial_for_url("meshsim://nope/b0")
    finally:
        port.close()


def test_time_scale_speeds_up_simulated_time() -> None:
    """With time_scale=100 a 2 s watchdog trips after a few hundredths of a wall second."""
    import time

    from meshwarden.protocol import messages as msg
    from tests.conftest import DEMO_CONFIG

    url = f"meshsim://scaled/b0?config={DEMO_CONFIG}&time_scale=100"
    port = serial.serial_for_url(url, timeout=0.2)
    try:
        client = BareClient(port)
        client.request(msg.ConfigureWatchdog(2000, msg.WatchdogAction.HOLD))
        time.sleep(0.1)  # 10 simulated seconds
        inprocess.get("scaled").tick()
        status = client.request(msg.Status())
        assert isinstance(status, msg.StatusReply) and status.flags & StatusFlag.WATCHDOG_TRIPPED
    finally:
        port.close()
        inprocess.remove("scaled")
