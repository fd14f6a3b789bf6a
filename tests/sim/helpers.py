"""Small simulated racks built in code, and a bare protocol client for talking to them.

The client uses only pyserial and the codec - nothing of the daemon - so these tests check the
simulator on its own, as a lab would check a new board with a terminal program.
"""

from __future__ import annotations

import math
import time
from dataclasses import replace

import numpy as np
import serial

from meshsim.chip import SimChip
from meshsim.clock import ManualClock
from meshsim.params import CouplerDevice, Crosstalk, Drift, LatticeSpec, PhaseDevice, SimParams, Spread, parse_params
from meshsim.rack import SimRack
from meshsim.scenario import ActuatorSpec, BoardSpec, MonitorSpec, Scenario
from meshwarden.errors import ProtocolError
from meshwarden.protocol import Frame, FrameDecoder, decode_reply, encode_frame
from meshwarden.protocol import messages as m
from meshwarden.protocol.messages import StatusFlag


def small_scenario() -> Scenario:
    """One board; gate g0 = coupler c0 on output 0 + phase p0 on output 1; g1 on outputs 2, 3;
    monitors m0, m1 on the two outputs of a 2-mode, 2-column lattice."""
    return Scenario(
        boards=(BoardSpec("b0", address=1, outputs=8, monitor_inputs=4),),
        actuators=(
            ActuatorSpec("c0", "coupler", "b0", 0),
            ActuatorSpec("p0", "phase", "b0", 1),
            ActuatorSpec("c1", "coupler", "b0", 2),
            ActuatorSpec("p1", "phase", "b0", 3),
        ),
        gates=(("g0", "c0", "p0"), ("g1", "c1", "p1")),
        monitors=(MonitorSpec("m0", "b0", 0), MonitorSpec("m1", "b0", 1)),
    )


IDEAL_SPREAD = Spread(0.0, 0.0, 0.0, static_phase_span_rad=0.0, splitting_angle_rad=0.0)
NO_CROSSTALK = Crosstalk(within_gate_fraction=0.0, adjacent_gate_fraction=0.0)
NO_DRIFT = Drift(random_walk_rad_per_sqrt_s=0.0)


def small_params(**changes: object) -> SimParams:
    """Nominal demo devices on an ideal chip: no fabrication spread or errors, no crosstalk, no
    drift, no phase-dependent loss, no stiction - unless asked."""
    base = parse_params({"seed": 3})
    lattice = LatticeSpec(
        modes=2, columns=((("g0", 0),), (("g1", 0),)), taps=(("m0", 1, 0), ("m1", 1, 1)), tap_fraction=0.01
    )
    params = replace(
        base,
        spread=IDEAL_SPREAD,
        lattice=lattice,
        coupler=replace(CouplerDevice(), stiction_probability=0.0),
        phase=replace(PhaseDevice(), stiction_probability=0.0, loss_db_per_rad=0.0),
        crosstalk=NO_CROSSTALK,
        drift=NO_DRIFT,
    )
    return replace(params, **changes)  # type: ignore[arg-type]


def balanced_coupler() -> CouplerDevice:
    """The demo coupler redesigned to split 50:50 at rest (C L = pi/4 at its rest gap), no stiction."""
    device = CouplerDevice()
    return replace(
        device,
        stiction_probability=0.0,
        coupling_ref_gap_m=device.optical_gap_rest_m,
        coupling_ref_per_m=(math.pi / 4) / device.coupling_length_m,
    )


def column_scenario(gates: int) -> Scenario:
    """``gates`` gates side by side in one lattice column (gate i: coupler ci on output 2i, phase pi
    on output 2i + 1, top mode 2i), a monitor on every output mode."""
    actuators = []
    for i in range(gates):
        actuators += [ActuatorSpec(f"c{i}", "coupler", "b0", 2 * i), ActuatorSpec(f"p{i}", "phase", "b0", 2 * i + 1)]
    return Scenario(
        boards=(BoardSpec("b0", address=1, outputs=2 * gates, monitor_inputs=2 * gates),),
        actuators=tuple(actuators),
        gates=tuple((f"g{i}", f"c{i}", f"p{i}") for i in range(gates)),
        monitors=tuple(MonitorSpec(f"m{k}", "b0", k) for k in range(2 * gates)),
    )


def column_params(gates: int, **changes: object) -> SimParams:
    """The ideal chip of :func:`small_params` on the lattice of :func:`column_scenario`."""
    lattice = LatticeSpec(
        modes=2 * gates,
        columns=(tuple((f"g{i}", 2 * i) for i in range(gates)),),
        taps=tuple((f"m{k}", 0, k) for k in range(2 * gates)),
        tap_fraction=0.01,
    )
    return small_params(lattice=lattice, **changes)


def column_chip(gates: int, seed: int = 11, **changes: object) -> SimChip:
    """A chip of :func:`column_scenario` with :func:`column_params`, seeded."""
    rng = np.random.default_rng(np.random.SeedSequence(seed))
    return SimChip(column_scenario(gates), column_params(gates, **changes), rng)


def small_rack(**changes: object) -> tuple[SimRack, ManualClock]:
    """The small rack, its boards' power-on flags already cleared (as a host does before writing)."""
    clock = ManualClock()
    rack = SimRack(small_scenario(), small_params(**changes), clock)
    for board in rack.boards.values():
        board.flags &= ~StatusFlag.POWER_ON
    return rack, clock


class BareClient:
    """Request/response over any pyserial port, with the protocol codec and nothing else."""

    def __init__(self, port: serial.SerialBase, address: int = 1) -> None:
        self.port = port
        self.address = address
        self.seq = 0
        self.decoder = FrameDecoder()

    def send_raw(self, data: bytes) -> None:
        self.port.write(data)

    def receive(self, timeout: float = 2.0) -> Frame | ProtocolError | None:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            chunk = self.port.read(max(1, self.port.in_waiting))
            for item in self.decoder.feed(chunk):
                return item
        return None

    def request(self, message: m.Message, seq: int | None = None, timeout: float = 2.0) -> m.Message:
        """Send ``message`` and return the decoded reply to it (skipping NAKs for garbage)."""
        if seq is None:
            self.seq = (self.seq + 1) % 256
            seq = self.seq
        self.port.write(encode_frame(Frame(self.address, seq, message.CODE, message.pack())))
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            item = self.receive(max(deadline - time.monotonic(), 0.01))
            if isinstance(item, Frame) and item.seq == seq:
                return decode_reply(item.command, item.payload)
        raise TimeoutError(f"no reply to {type(message).__name__} seq {seq}")
