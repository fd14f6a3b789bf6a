"""`meshwarden serve`: the long-running process beside the rack.

Starts the controller (disarmed, adopting outputs), binds the bus, and runs until SIGTERM or
SIGINT. On the way out it cancels jobs (a ramp in progress stops at its next step), stops the
bus, and applies the configured shutdown policy to the outputs: ``hold`` (default) leaves them
for the next start to adopt - the boards' watchdogs ramp them to zero if no daemon comes back -
and ``ramp_to_zero`` disarms first. SIGHUP re-reads the client key allow-list.

What stays live is never left unsaid: at start the daemon says what it adopted, its watchdog
policy and the configuration's cautions; at shutdown it says (and journals) how many outputs stay
above zero, the highest voltage, and what each board's watchdog will do and when.
"""

from __future__ import annotations

import asyncio
import contextlib
import os
import signal
from collections.abc import Callable
from pathlib import Path
from typing import Any

from meshwarden.api import open_controller
from meshwarden.config.cautions import cautions
from meshwarden.config.model import Config
from meshwarden.controller import Controller
from meshwarden.logsetup import get_logger
from meshwarden.service.bus import Bus
from meshwarden.service.preflight import preflight

Say = Callable[[str], None]


def _quiet(_line: str) -> None:
    """The default for a daemon run in a thread (tests): the log carries everything."""


def watchdog_plan(config: Config) -> list[str]:
    """What each board's watchdog does once no daemon talks to it, one line per board."""
    out = []
    for b in config.rack.boards:
        if b.watchdog.action == "ramp_to_zero":
            out.append(
                f"board {b.id}: its watchdog ramps every output to zero "
                f"{b.watchdog.timeout_s:g} s after the last heartbeat"
            )
        else:
            out.append(
                f"board {b.id}: watchdog 'hold': its outputs STAY at their voltage until the rack is switched off"
            )
    return out


def live_report(controller: Controller) -> tuple[str, dict[str, Any]]:
    """One line on the outputs above zero (count, highest volts, per board), and the same as data."""
    count, highest = controller._state.live_outputs()
    per_board: dict[str, int] = {}
    for aid in controller.actuators:
        d = controller.describe(aid)
        if d["volts"] > 0.0:
            per_board[d["board"]] = per_board.get(d["board"], 0) + 1
    where = ", ".join(f"{b}: {n}" for b, n in sorted(per_board.items()))
    line = f"outputs live: {count}, highest {highest:.2f} V" + (f" ({where})" if where else "")
    return line, {"live_outputs": count, "highest_volts": round(highest, 4), "per_board": per_board}


def announce_start(config: Config, controller: Controller, say: Say) -> None:
    """The cautions an engineer must see at start: armed state, what is live, watchdogs, calibration."""
    line, _ = live_report(controller)
    say(f"meshwarden: started DISARMED (outputs change only after `meshwarden arm`); {line}")
    for board_line in watchdog_plan(config):
        say(f"meshwarden: {board_line}")
    for caution in cautions(config):
        say(f"meshwarden: {caution}")
    override = config.safety.margin_override
    if override is not None:
        controller.journal.event(
            "margin_override",
            margin=config.safety.pull_in_margin,
            measured_pull_in=override.measured_pull_in,
            reason=override.reason,
        )


async def serve(
    config: Config,
    ports: dict[str, str] | None = None,
    bind: str | None = None,
    pub: str | None = None,
    ready: Callable[[Bus], None] | None = None,
    shutdown: str = "hold",
    stop_event: asyncio.Event | None = None,
    *,
    say: Say = _quiet,
    run_token: str | None = None,
) -> None:
    """Serve until SIGTERM/SIGINT, or until ``stop_event`` is set (a daemon run in a thread, where
    the process's signals are not its to take). ``say`` receives the start and shutdown cautions
    (the command line prints them); ``run_token`` is reported by ``status`` so that whoever started
    this daemon can tell it from another one on the same port."""
    log = get_logger(component="daemon")
    stop = stop_event or asyncio.Event()
    loop = asyncio.get_running_loop()
    signals = stop_event is None
    # before any board link is opened: an exposed endpoint without CURVE, or a secret key file
    # others can read, stops the start here, with the rack untouched
    preflight(config, bind or config.service.bind, pub or config.service.pub)
    async with open_controller(config, ports) as controller:
        bus = Bus(controller, config, bind, pub)
        bus.dispatcher.run_token = run_token
        bus.start()
        announce_start(config, controller, say)
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
            line, detail = live_report(controller)
            plan = watchdog_plan(config)
            controller.journal.event("shutdown", policy=shutdown, watchdogs=plan, **detail)
            log.info("shutdown", policy=shutdown, **detail)
            if detail["live_outputs"]:
                say(
                    f"meshwarden: stopping with outputs LIVE - {line}; "
                    "they stay at high voltage after this process ends"
                )
                for board_line in plan:
                    say(f"meshwarden: {board_line}")
                say(
                    "meshwarden: to leave them at zero, run `meshwarden disarm` before stopping "
                    "(or serve --shutdown ramp_to_zero)"
                )
            else:
                say(f"meshwarden: stopping; {line}")
    log.info("stopped")


PACKAGED_DEMO = Path(__file__).resolve().parents[1] / "demo_config" / "demo.yaml"


def demo_config_path() -> Path:
    """The shipped demo configuration: in an installed wheel, the package's copy; in a source
    checkout, config/demo.yaml beside the package."""
    if PACKAGED_DEMO.exists():
        return PACKAGED_DEMO
    return Path(__file__).resolve().parents[3] / "config" / "demo.yaml"


def user_data_dir() -> Path:
    """Where the packaged demo keeps its journal: $XDG_DATA_HOME/meshwarden, else
    ~/.local/share/meshwarden (the package's own folder may not be writable)."""
    base = os.environ.get("XDG_DATA_HOME") or str(Path.home() / ".local" / "share")
    return Path(base) / "meshwarden"
