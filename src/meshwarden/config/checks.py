"""Checks across sections: the wiring and the limits must make sense together.

These are the mistakes that put a voltage on the wrong channel or past a pull-in voltage:
a channel wired twice, a reference to a board that does not exist, a limit above what the
board can output or too close to pull-in, a gate whose coupler is really a phase shifter.
"""

from __future__ import annotations

import ipaddress
import os
import re
from collections.abc import Callable
from pathlib import Path
from typing import Any

from meshwarden.calibration import load_calibration
from meshwarden.config import fields as f
from meshwarden.config.model import MIN_PULL_IN_MARGIN, ActuatorConfig, Config, Terminal
from meshwarden.config.source import PathKey, dotted
from meshwarden.errors import CalibrationError


def _index_of(path_of: Callable[[int], PathKey], ids: list[str], problems: f.Problems, what: str) -> None:
    seen: dict[str, int] = {}
    for i, item_id in enumerate(ids):
        if item_id in seen:
            problems.add((*path_of(i), "id"), f"duplicate {what} id '{item_id}' (first used at index {seen[item_id]})")
        else:
            seen[item_id] = i


def check_config(config: Config, p: f.Problems) -> None:
    """Record every cross-reference problem of ``config`` in ``p``."""
    _check_boards(config, p)
    _check_ids(config, p)
    _check_actuators(config, p)
    _check_gates(config, p)
    _check_monitors(config, p)
    _check_service(config, p)
    _check_safety(config, p)
    _check_journal(config, p)


def _check_boards(config: Config, p: f.Problems) -> None:
    from meshwarden.drivers.registry import known_drivers  # the shipped ones and entry points

    drivers = known_drivers()
    _index_of(lambda i: ("rack", "boards", i), [b.id for b in config.rack.boards], p, "board")
    seen_links: dict[tuple[str, int], str] = {}
    for i, board in enumerate(config.rack.boards):
        if board.driver not in drivers:
            p.add(
                ("rack", "boards", i, "driver"),
                f"unknown board driver '{board.driver}' (known: {', '.join(sorted(drivers))})"
                f"{f.suggest(board.driver, drivers)}",
            )
        link = (board.url, board.address)
        if link in seen_links and seen_links[link] != board.id:
            p.add(
                ("rack", "boards", i, "url"),
                f"board '{board.id}' has the same url and address as board '{seen_links[link]}'",
            )
        seen_links.setdefault(link, board.id)
        url_problem = _url_problem(board.url)
        if url_problem:
            p.add(("rack", "boards", i, "url"), url_problem)
        if board.watchdog.timeout_s < 2 * board.timeout_s:
            p.add(
                ("rack", "boards", i, "watchdog", "timeout_s"),
                f"watchdog timeout {board.watchdog.timeout_s:g} s is shorter than two link timeouts "
                f"({2 * board.timeout_s:g} s): the board would trip on one slow reply",
            )


def _check_ids(config: Config, p: f.Problems) -> None:
    """One namespace for actuators, gates and monitors: `set ID=VALUE` must never be ambiguous."""
    chip = config.chip
    named: dict[str, PathKey] = {}
    path: PathKey
    items: Any
    for group, items in (("actuators", chip.actuators), ("gates", chip.gates), ("monitors", chip.monitors)):
        for i, item in enumerate(items):
            path = ("chip", group, i, "id")
            if item.id in named:
                p.add(path, f"duplicate id '{item.id}' (already used at {dotted(named[item.id])})")
            else:
                named[item.id] = path


def _check_actuators(config: Config, p: f.Problems) -> None:
    boards = {b.id: b for b in config.rack.boards}
    outputs: dict[Terminal, str] = {}
    blamed: set[tuple[PathKey, str]] = set()

    def blame(at: PathKey, act: ActuatorConfig, key: str, message: str) -> None:
        """Report on the actuator's own line, or once on the defaults line it inherited the value from."""
        if (*at, key) in p.locations.marks:
            p.add((*at, key), message)
            return
        origin: PathKey = ("chip", "actuator_defaults", act.kind, key)
        if (origin, message) not in blamed:
            blamed.add((origin, message))
            p.add(origin, f"{message} (inherited by {act.kind} actuators, first '{act.id}')")

    for i, act in enumerate(config.chip.actuators):
        at = ("chip", "actuators", i)
        board = boards.get(act.output.board)
        if board is None:
            p.add((*at, "output"), f"board '{act.output.board}' does not exist{f.suggest(act.output.board, boards)}")
            continue
        if act.output.index >= board.outputs:
            p.add((*at, "output"), f"board '{board.id}' has outputs 0 to {board.outputs - 1}, not {act.output.index}")
        elif act.output in outputs:
            p.add((*at, "output"), f"output {act.output} is already wired to actuator '{outputs[act.output]}'")
        else:
            outputs[act.output] = act.id
        if act.limit_volts > board.full_scale_volts:
            blame(
                at,
                act,
                "limit_volts",
                f"limit {act.limit_volts:g} V is above board '{board.id}' full scale {board.full_scale_volts:g} V",
            )
        ceiling = (1.0 - config.safety.pull_in_margin) * act.pull_in_volts
        if act.limit_volts > ceiling:
            blame(
                at,
                act,
                "limit_volts",
                f"limit {act.limit_volts:g} V is above {ceiling:.4g} V, the pull-in voltage "
                f"{act.pull_in_volts:g} V less the {config.safety.pull_in_margin:g} safety margin",
            )
        if act.step_limit_volts > act.limit_volts:
            blame(
                at,
                act,
                "step_limit_volts",
                f"step limit {act.step_limit_volts:g} V is above the actuator's limit {act.limit_volts:g} V",
            )
        try:
            table = load_calibration(act.calibration)
        except CalibrationError as exc:
            named = exc.message if str(act.calibration) in exc.message else f"{_short(act.calibration)}: {exc.message}"
            p.add((*at, "calibration"), named)
        else:
            if table.actuator != act.id:
                p.add(
                    (*at, "calibration"),
                    f"{act.calibration.name} is the calibration of '{table.actuator}', not '{act.id}'",
                )
            elif table.kind != act.kind:
                p.add(
                    (*at, "calibration"),
                    f"{act.calibration.name} calibrates a {table.kind}, but '{act.id}' is a {act.kind}",
                )


def _check_gates(config: Config, p: f.Problems) -> None:
    kinds = {a.id: a.kind for a in config.chip.actuators}
    member_of: dict[str, str] = {}
    for i, gate in enumerate(config.chip.gates):
        for role in ("coupler", "phase"):
            member = getattr(gate, role)
            at = ("chip", "gates", i, role)
            if member not in kinds:
                p.add(at, f"actuator '{member}' does not exist{f.suggest(member, kinds)}")
            elif kinds[member] != role:
                p.add(at, f"actuator '{member}' is a {kinds[member]}, but a gate's {role} must be a {role}")
            elif member in member_of:
                p.add(at, f"actuator '{member}' already belongs to gate '{member_of[member]}'")
            else:
                member_of[member] = gate.id


def _check_monitors(config: Config, p: f.Problems) -> None:
    boards = {b.id: b for b in config.rack.boards}
    inputs: dict[Terminal, str] = {}
    for i, mon in enumerate(config.chip.monitors):
        at = ("chip", "monitors", i)
        board = boards.get(mon.input.board)
        if board is None:
            p.add((*at, "input"), f"board '{mon.input.board}' does not exist{f.suggest(mon.input.board, boards)}")
            continue
        if mon.input.index >= board.monitor_inputs:
            p.add(
                (*at, "input"),
                f"board '{board.id}' has monitor inputs 0 to {board.monitor_inputs - 1}, not {mon.input.index}",
            )
        elif mon.input in inputs:
            p.add((*at, "input"), f"monitor input {mon.input} is already used by monitor '{inputs[mon.input]}'")
        else:
            inputs[mon.input] = mon.id
        if mon.transimpedance_ohms not in board.monitor_gains_ohms:
            gains = ", ".join(f"{g:g}" for g in board.monitor_gains_ohms)
            p.add(
                (*at, "transimpedance_ohms"),
                f"{mon.transimpedance_ohms:g} ohm is not a gain of board '{board.id}' (it has: {gains})",
            )


def _check_service(config: Config, p: f.Problems) -> None:
    service = config.service
    if service.bind == service.pub:
        p.add(("service", "pub"), f"the telemetry endpoint is the command endpoint ({service.bind}); give each its own")
    if not all(is_loopback(e) for e in (service.bind, service.pub)) and service.server_secret_key_file is None:
        p.add(("service",), "binding beyond loopback needs server_secret_key_file and an allow-list of clients")


def is_loopback(endpoint: str) -> bool:
    """True only for ``tcp://HOST:PORT`` with HOST an address in 127.0.0.0/8, ``::1`` (or
    ``[::1]``) or the name ``localhost``, and for ``ipc://`` paths (a file on this machine).
    Anything else - other schemes, host names such as ``127.example.org``, wildcards, interface
    names - is treated as reachable from outside and needs CURVE. It fails closed."""
    scheme, sep, rest = endpoint.partition("://")
    if not sep:
        return False
    if scheme == "ipc":
        return bool(rest)
    if scheme != "tcp":
        return False
    host, colon, port = rest.rpartition(":")
    if not colon or not (port.isdigit() or port == "*"):
        return False
    if host == "localhost":
        return True
    if host.startswith("[") and host.endswith("]"):
        host = host[1:-1]
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def _url_problem(url: str) -> str | None:
    """What is wrong with a board url that cannot work as written (None when it may)."""
    if url.startswith("socket://"):
        rest = url[len("socket://") :].split("?", 1)[0].rstrip("/")
        host, _, port = rest.rpartition(":")
        if not host or not port.isdigit():
            return f"'{url}' has no port: write socket://HOST:PORT"
        return None
    if re.fullmatch(r"(tty|cu\.)[A-Za-z0-9_.-]+", url):
        return f"'{url}' is not a device path: did you mean '/dev/{url}'?"
    if re.fullmatch(r"COM\d+", url) or "://" in url or url.startswith("/"):
        return None
    return f"'{url}' is neither a device path (/dev/...) nor a url (socket://HOST:PORT, meshsim://...)"


def _check_safety(config: Config, p: f.Problems) -> None:
    safety = config.safety
    if safety.pull_in_margin < MIN_PULL_IN_MARGIN and safety.margin_override is None:
        p.add(
            ("safety", "pull_in_margin"),
            f"a pull-in margin of {safety.pull_in_margin:g} is below the minimum {MIN_PULL_IN_MARGIN:g}; "
            "a thinner margin needs safety.margin_override with measured_pull_in (where this chip's "
            "pull-in voltages were measured) and reason",
        )


def _check_journal(config: Config, p: f.Problems) -> None:
    """The journal must be creatable: the daemon refuses to move outputs it cannot record."""
    path = config.journal.path
    if path.is_dir():
        p.add(("journal", "path"), f"{path} is a folder; give a file path such as {path / 'journal.sqlite'}")
        return
    if path.exists():
        if not os.access(path, os.W_OK):
            p.add(("journal", "path"), f"{path} is not writable by this user")
        return
    folder: Path = path.parent
    while not folder.exists() and folder != folder.parent:
        folder = folder.parent
    if not folder.is_dir() or not os.access(folder, os.W_OK | os.X_OK):
        p.add(("journal", "path"), f"cannot create {path}: {folder} is not a writable folder")


def _short(path: Path) -> str:
    """``path`` relative to the working folder when it is below it (as the user typed it), else absolute."""
    try:
        return path.relative_to(Path.cwd()).as_posix()
    except ValueError:
        return str(path)
