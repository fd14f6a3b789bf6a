"""`meshwarden serve`: the long-running process beside the rack.

Starts the controller (disarmed, adopting outputs), binds the bus, and runs until SIGTERM or
SIGINT. On the way out it cancels jobs (a ramp in progress stops at its next step), stops the
bus, and applies the configured shutdown policy to the outputs: ``hold`` (default) leaves them
for the next start to adopt - the boards' watchdogs ramp them to zero if no daemon comes back -
and ``ramp_to_zero`` disarms first. SIGHUP re-reads the client key allow-list.
"""

from __future__ import annotations

import asyncio
import contextlib
import signal
from collections.abc import Callable
from pathlib import Path

from meshwarden.api import open_controller
from meshwarden.config.model import Config
from meshwarden.logsetup import get_logger
from meshwarden.service.bus import Bus
from meshwarden.service.preflight import preflight


async def serve(
    config: Config,
    ports: dict[str, str] | None = None,
    bind: str | None = None,
    pub: str | None = None,
    ready: Callable[[Bus], None] | None = None,
    shutdown: str = "hold",
    stop_event: asyncio.Event | None = None,
) -> None:
    """Serve until SIGTERM/SIGINT, or until ``stop_event`` is set (a daemon run in a thread, where
    the process's signals are not its to take)."""
    log = get_logger(component="daemon")
    stop = stop_event or asyncio.Event()
    loop = asyncio.get_running_loop()
    signals = stop_event is None
    # before any board link is opened: an exposed endpoint without CURVE, or a secret key file
    # others can read, stops the start here, with the rack untouched
    preflight(config, bind or config.service.bind, pub or config.service.pub)
    async with open_controller(config, ports) as controller:
        bus = Bus(controller, config, bind, pub)
        bus.start()
        if signals:
            for sig in (signal.SIGTERM, signal.SIGINT):
                loop.add_signal_handler(sig, stop.set)
            loop.add_signal_handler(signal.SIGHUP, lambda: log.info("keys reloaded", count=bus.reload_keys()))
        if ready is not None:
            ready(bus)
        schedule = asyncio.ensure_future(bus.dispatcher.scans.run_schedule())  # automatic fault scans
        try:
            await stop.wait()
        finally:
            schedule.cancel()
            log.info("stopping")
            if signals:
                for sig in (signal.SIGTERM, signal.SIGINT, signal.SIGHUP):
                    loop.remove_signal_handler(sig)
            bus.dispatcher.jobs.cancel_all()
            with contextlib.suppress(asyncio.CancelledError):
                await schedule
            await bus.close()
            if shutdown == "ramp_to_zero" and not controller.estopped:
                await controller.disarm(client="shutdown")
    log.info("stopped")


def demo_config_path() -> Path:
    """The shipped demo configuration (in a source checkout, beside the package)."""
    return Path(__file__).resolve().parents[3] / "config" / "demo.yaml"
