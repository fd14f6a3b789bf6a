"""Write a :class:`Config` back out as plain data (and YAML) that loads to an equal object.

Paths are written absolute, so the dump can be loaded from anywhere; defaults are written
explicitly, so the dump documents every value actually in force.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path
from typing import Any

import yaml

from meshwarden.config.model import Config, Terminal


def _plain(value: Any) -> Any:
    if isinstance(value, Terminal):
        return str(value)
    if isinstance(value, Path):
        return value.as_posix()
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        return {f.name: _plain(getattr(value, f.name)) for f in dataclasses.fields(value) if f.compare}
    if isinstance(value, tuple | list):
        return [_plain(v) for v in value]
    return value


def dump_config(config: Config) -> dict[str, Any]:
    """The configuration as nested plain values in the file's own layout."""
    data: dict[str, Any] = _plain(config)
    data["chip"] = {key: data["chip"][key] for key in ("actuators", "gates", "monitors")}
    lattice = config.chip.lattice
    if lattice is not None:
        data["chip"]["lattice"] = {
            "modes": lattice.modes,
            "columns": [{gate: top for gate, top in column} for column in lattice.columns],
            "taps": {monitor: [after, mode] for monitor, after, mode in lattice.taps},
            "input_modes": list(lattice.input_modes),
        }
    data["service"] = {k: v for k, v in data["service"].items() if v is not None}
    data["safety"] = {k: v for k, v in data["safety"].items() if v is not None}
    return data


def dump_config_text(config: Config) -> str:
    """The configuration as one self-contained YAML document."""
    return str(yaml.safe_dump(dump_config(config), sort_keys=False, default_flow_style=None, width=120))
