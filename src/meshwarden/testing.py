"""Test doubles for users' own experiment tests: a recording board, and a daemon in a thread.

``driver: recording`` on a board in a configuration makes it an in-memory board that keeps every
code written (:attr:`RecordingDriver.writes`), so an experiment script can be tested against the
real controller, guard and bus without hardware and without the simulator::

    from meshwarden.testing import RecordingDriver, running_daemon

    with running_daemon(load_config("tests/lab.yaml")) as (endpoint, telemetry):
        with Client(endpoint, telemetry) as mw:
            mw.arm()
            mw.set({"g05.kappa": 0.5})
    assert RecordingDriver.boards["b0"].codes[10] > 0

Monitor inputs read what :attr:`RecordingDriver.monitor_counts` holds (zeros by default).

The driver conformance suite (:mod:`meshwarden.conformance`) is reachable from here too:
``run_conformance(board, url=...)`` checks a driver and a board against the driver contract.
"""

from __future__ import annotations

import asyncio
import contextlib
import socket
import threading
import time
from collections.abc import Iterator
from typing import ClassVar

from meshwarden.config.model import BoardConfig, Config
from meshwarden.conformance import ConformanceReport, LinkControl, run_conformance
from meshwarden.drivers.base import BoardDriver
from meshwarden.drivers.registry import register_driver
from meshwarden.protocol import messages as m
from meshwarden.protocol.messages import NakReason, WatchdogAction


class RecordingDriver(BoardDriver):
    """An in-memory board that records every write; ``RecordingDriver.boards[id]`` is the latest."""

    boards: ClassVar[dict[str, RecordingDriver]] = {}

    def __init__(self, config: BoardConfig) -> None:
        super().__init__(config)
        self.codes = [0] * config.outputs
        self.monitor_counts = [0] * config.monitor_inputs
        self.gains = [0] * config.monitor_inputs
        self.writes: list[tuple[float, int, tuple[int, ...]]] = []
        self.boot_count = 1
        self.watchdog = (0, WatchdogAction.OFF)
        self.opened = False
        RecordingDriver.boards[config.id] = self

    def _open_link(self) -> None:
        self.opened = True

    def _close_link(self) -> None:
        self.opened = False

    def _exchange(self, request: m.Message) -> m.Message:
        c = self.config
        if isinstance(request, m.Identify):
            return m.IdentifyReply(
                "RECORDING",
                (1, 0, 0),
                c.outputs,
                c.monitor_inputs,
                c.dac_bits,
                c.adc_bits,
                round(c.full_scale_volts * 1000),
                2_500_000,
                1,
                self.boot_count,
                tuple(round(g) for g in c.monitor_gains_ohms),
            )
        if isinstance(request, m.WriteOutputs):
            self.codes[request.first : request.first + len(request.values)] = list(request.values)
            self.writes.append((time.monotonic(), request.first, tuple(request.values)))
            return m.OutputsReply(request.first, request.values)
        if isinstance(request, m.ReadOutputs):
            return m.OutputsReply(request.first, tuple(self.codes[request.first : request.first + request.count]))
        if isinstance(request, m.ReadSense):
            lsb_uv = c.full_scale_volts / (1 << c.dac_bits) * 1e6
            span = self.codes[request.first : request.first + request.count]
            return m.SenseReply(request.first, tuple(round(code * lsb_uv) for code in span))
        if isinstance(request, m.ReadMonitors):
            span = self.monitor_counts[request.first : request.first + request.count]
            return m.MonitorsReply(request.first, request.integration_us, tuple(span))
        if isinstance(request, m.SetMonitorGain):
            self.gains[request.first : request.first + len(request.values)] = list(request.values)
            return m.GainReply(request.first, request.values)
        if isinstance(request, m.ConfigureWatchdog):
            self.watchdog = (request.timeout_ms, WatchdogAction(request.action))
            return m.WatchdogReply(request.timeout_ms, request.action)
        if isinstance(request, m.Heartbeat):
            return m.HeartbeatReply(0, self.boot_count)
        if isinstance(request, m.Status):
            return m.StatusReply(0, self.boot_count, 0, self.watchdog[0], 0, 0)
        if isinstance(request, m.ZeroAll):
            self.codes = [0] * c.outputs
            return m.Ack()
        if isinstance(request, m.Reset):
            self.codes = [0] * c.outputs
            self.boot_count += 1
            return m.Ack()
        if isinstance(request, m.ClearFaults):
            return m.Ack()
        return m.Nak(request.CODE, NakReason.UNKNOWN_COMMAND)


register_driver("recording", __name__, "RecordingDriver")


def unguarded_driver(board: BoardConfig) -> BoardDriver:
    """An unopened driver for ``board`` whose output ceiling is the DAC's top code on every
    output: no hard limit behind it. Only for tests that must show what a write the guard would
    never plan does at the board (a raw step that snaps an actuator, a driver test suite); the
    daemon never creates one."""
    from meshwarden.drivers.registry import create_driver

    driver = create_driver(board)
    driver.set_ceiling((driver.max_code,) * board.outputs)
    return driver


def free_port() -> int:
    """A TCP port on 127.0.0.1 that is free now (for tests and benchmarks; another process could
    still take it before it is bound)."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@contextlib.contextmanager
def running_daemon(config: Config, ports: dict[str, str] | None = None) -> Iterator[tuple[str, str]]:
    """The daemon serving ``config`` in a background thread on free loopback ports; yields the
    command and telemetry endpoints; stops it (outputs held) when the block ends."""
    from meshwarden.service.daemon import serve

    endpoint = f"tcp://127.0.0.1:{free_port()}"
    pub = f"tcp://127.0.0.1:{free_port()}"
    ready = threading.Event()
    state: dict[str, object] = {}

    def run() -> None:
        async def main() -> None:
            stop = asyncio.Event()
            state["loop"], state["stop"] = asyncio.get_running_loop(), stop
            await serve(config, ports, endpoint, pub, lambda _bus: ready.set(), stop_event=stop)

        try:
            asyncio.run(main())
        except BaseException as exc:  # reported to the caller below
            state["error"] = exc
            ready.set()

    thread = threading.Thread(target=run, name="meshwarden-test-daemon", daemon=True)
    thread.start()
    ready.wait(60)
    if "error" in state:
        raise RuntimeError(f"the daemon did not start: {state['error']}")
    try:
        yield endpoint, pub
    finally:
        loop = state.get("loop")
        stop = state.get("stop")
        if isinstance(loop, asyncio.AbstractEventLoop) and isinstance(stop, asyncio.Event):
            loop.call_soon_threadsafe(stop.set)
        thread.join(30)


__all__ = [
    "ConformanceReport",
    "LinkControl",
    "RecordingDriver",
    "free_port",
    "run_conformance",
    "running_daemon",
    "unguarded_driver",
]
