"""What the simulator reads from a configuration file: the wiring and the physics.

The simulator is the other side of the cable, so it does not use the daemon's configuration
code: it reads the same YAML itself. From the ``rack`` and ``chip`` sections it takes only the
wiring (which board, which channel, which kind of device); everything physical - stiffness,
gaps, quality factors, losses, the laser, the lattice layout - comes from the ``simulator``
section, which the daemon never reads. A lab that has a real rack simply has no such section.

Units in the YAML are in the key names (``air_gap_um``); here everything is converted to SI.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import yaml


class ScenarioError(Exception):
    """A configuration the simulator cannot build a rack from; the message says what and where."""


def _include_loader(base: Path, stack: tuple[Path, ...]) -> type[yaml.SafeLoader]:
    class Loader(yaml.SafeLoader):
        pass

    def include(loader: yaml.SafeLoader, node: yaml.Node) -> Any:
        target = (base / str(loader.construct_scalar(node))).resolve()  # type: ignore[arg-type]
        return _read(target, stack)

    Loader.add_constructor("!include", include)
    return Loader


def _read(path: Path, stack: tuple[Path, ...] = ()) -> Any:
    if path in stack:
        raise ScenarioError(f"include cycle at {path}")
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise ScenarioError(f"cannot read {path}: {exc.strerror or exc}") from None
    try:
        return yaml.load(text, Loader=_include_loader(path.parent, (*stack, path)))
    except yaml.YAMLError as exc:
        raise ScenarioError(f"{path}: not valid YAML: {exc}") from None


@dataclass(frozen=True)
class BoardSpec:
    """A driver board as the simulated hardware has it."""

    id: str
    address: int = 1
    outputs: int = 64
    monitor_inputs: int = 32
    dac_bits: int = 16
    full_scale_volts: float = 60.0
    adc_bits: int = 16
    monitor_gains_ohms: tuple[float, ...] = (1e3, 1e4, 1e5, 1e6)


@dataclass(frozen=True)
class ActuatorSpec:
    id: str
    kind: str
    board: str
    channel: int


@dataclass(frozen=True)
class MonitorSpec:
    id: str
    board: str
    input: int


@dataclass(frozen=True)
class Scenario:
    """Wiring plus the raw ``simulator`` section (parsed further by :mod:`meshsim.params`)."""

    boards: tuple[BoardSpec, ...]
    actuators: tuple[ActuatorSpec, ...]
    gates: tuple[tuple[str, str, str], ...]
    monitors: tuple[MonitorSpec, ...]
    simulator: dict[str, Any] = field(default_factory=dict)
    source: Path | None = None


_PREFIX = {"": 1.0, "k": 1e3, "M": 1e6, "m": 1e-3, "u": 1e-6, "µ": 1e-6}


def _number(value: Any, unit: str, what: str) -> float:
    """A number, or text like '60 V' / '1 kohm' in ``unit`` with an optional SI prefix."""
    if isinstance(value, int | float) and not isinstance(value, bool):
        return float(value)
    match = re.match(r"^\s*([-+0-9.eE]+)\s*([kMmuµ]?)" + re.escape(unit) + r"\s*$", str(value))
    if not match:
        raise ScenarioError(f"{what}: expected a number in {unit}, got {value!r}")
    return float(match.group(1)) * _PREFIX[match.group(2)]


def _board(raw: dict[str, Any]) -> BoardSpec:
    where = f"board {raw.get('id')}"
    d = BoardSpec(id="")
    return BoardSpec(
        id=str(raw["id"]),
        address=int(raw.get("address", d.address)),
        outputs=int(raw.get("outputs", d.outputs)),
        monitor_inputs=int(raw.get("monitor_inputs", d.monitor_inputs)),
        dac_bits=int(raw.get("dac_bits", d.dac_bits)),
        full_scale_volts=_number(raw.get("full_scale_volts", d.full_scale_volts), "V", where),
        adc_bits=int(raw.get("adc_bits", d.adc_bits)),
        monitor_gains_ohms=tuple(_number(g, "ohm", where) for g in raw.get("monitor_gains_ohms", d.monitor_gains_ohms)),
    )


def _terminal(text: Any, what: str) -> tuple[str, int]:
    if not isinstance(text, str) or ":" not in text:
        raise ScenarioError(f"{what}: expected BOARD:NUMBER, got {text!r}")
    board, _, index = text.partition(":")
    try:
        return board.strip(), int(index)
    except ValueError:
        raise ScenarioError(f"{what}: expected BOARD:NUMBER, got {text!r}") from None


def load_scenario(path: str | Path) -> Scenario:
    """Read the wiring and the simulator section of the configuration at ``path``."""
    raw = _read(Path(path).resolve())
    if not isinstance(raw, dict):
        raise ScenarioError(f"{path}: expected a mapping at the top")
    try:
        boards = tuple(_board(b) for b in raw["rack"]["boards"])
        chip = raw["chip"]
        actuators = []
        for a in chip["actuators"]:
            board, channel = _terminal(a.get("output"), f"actuator {a.get('id')}")
            actuators.append(ActuatorSpec(str(a["id"]), str(a["kind"]), board, channel))
        gates = tuple((str(g["id"]), str(g["coupler"]), str(g["phase"])) for g in chip.get("gates", []) or [])
        monitors = []
        for m in chip.get("monitors", []) or []:
            board, index = _terminal(m.get("input"), f"monitor {m.get('id')}")
            monitors.append(MonitorSpec(str(m["id"]), board, index))
    except (KeyError, TypeError, AttributeError, ValueError) as exc:
        raise ScenarioError(
            f"{path}: the rack or chip section is incomplete ({exc!r}); run 'meshwarden check-config' on it first"
        ) from None
    sim = raw.get("simulator") or {}
    if not isinstance(sim, dict):
        raise ScenarioError(f"{path}: the simulator section must be a mapping")
    if "extends" in sim:  # another simulator section (usually an !include) with these keys on top
        base = sim["extends"]
        if not isinstance(base, dict):
            raise ScenarioError(f"{path}: simulator.extends must be a mapping (a simulator section)")
        sim = {**base, **{k: v for k, v in sim.items() if k != "extends"}}
    return Scenario(boards, tuple(actuators), gates, tuple(monitors), sim, Path(path).resolve())
