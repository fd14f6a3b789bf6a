"""Bench configurations for driver tests: the one-board bench of tests/control, spoken in the
reference protocol or in SCPI (``driver: scpi`` and the simulator's SCPI personality)."""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

from meshsim.nominal import write_nominal_tables
from meshsim.params import parse_params
from meshsim.rack import SimRack
from meshsim.scenario import load_scenario
from meshsim.serve import RackServer
from meshwarden.config import load_config
from meshwarden.config.model import BoardConfig
from tests.control.bench import write_bench

DRIVERS = ("reference", "scpi")


def write_driver_bench(folder: Path, driver: str, *, interlock: bool = False, **changes: object) -> tuple[Path, str]:
    """The bench config for ``driver`` (its simulator speaking the same), and its rack name."""
    path, rack = write_bench(folder, **changes)
    if driver == "scpi" or interlock:
        text = path.read_text(encoding="utf-8")
        board_lines = "      url: "
        extra = ""
        if driver == "scpi":
            extra += "      driver: scpi\n"
        if interlock:
            extra += "      interlock: true\n"
        text = text.replace(board_lines, extra + board_lines, 1)
        if driver == "scpi":
            text = text.replace("simulator:\n", "simulator:\n  personality: scpi\n", 1)
        path.write_text(text, encoding="utf-8")
        scenario = load_scenario(path)
        write_nominal_tables(scenario, parse_params(scenario.simulator), folder / "cal")
    return path, rack


@contextmanager
def served_board(folder: Path, driver: str, **changes: object) -> Iterator[tuple[BoardConfig, SimRack]]:
    """The bench's board served over a pty by an in-process simulated rack (so tests can inject
    faults into it), with its configuration pointing at that pty."""
    path, _ = write_driver_bench(folder, driver, **changes)
    rack = SimRack.from_config(path)
    server = RackServer(rack, "pty").start()
    try:
        board = load_config(path).rack.boards[0]
        yield board.__class__(**{**board.__dict__, "url": server.ports()["b0"]}), rack
    finally:
        server.stop()


def write_two_board_bench(folder: Path, driver: str, **changes: object) -> tuple[Path, str]:
    """The bench with a second board b1 carrying gate g1 (c1, p1); b0's interlock input is watched."""
    path, rack = write_driver_bench(folder, driver, interlock=True, **changes)
    text = path.read_text(encoding="utf-8")
    head, _, rest = text.partition("chip:\n")
    b0 = head.split("    - id: b0\n", 1)[1]
    b1 = b0.replace("/b0?", "/b1?").replace("      interlock: true\n", "")
    head = head + "    - id: b1\n" + b1
    rest = rest.replace('output: "b0:4"', 'output: "b1:4"').replace('output: "b0:5"', 'output: "b1:5"')
    path.write_text(head + "chip:\n" + rest, encoding="utf-8")
    scenario = load_scenario(path)
    write_nominal_tables(scenario, parse_params(scenario.simulator), folder / "cal")
    return path, rack
