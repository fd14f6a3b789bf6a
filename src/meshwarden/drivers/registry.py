"""Board driver types by name, imported lazily; outside packages add theirs by entry point.

A lab with its own board type ships a package declaring, in its pyproject::

    [project.entry-points."meshwarden.board_drivers"]
    acme64 = "acme_boards.driver:Acme64Driver"

and sets ``driver: acme64`` on the board in the configuration. No edit of meshwarden needed.
"""

from __future__ import annotations

import importlib
from importlib.metadata import entry_points
from typing import TYPE_CHECKING

from meshwarden.config.model import BoardConfig
from meshwarden.errors import ConfigError, ConfigIssue

if TYPE_CHECKING:
    from meshwarden.drivers.base import BoardDriver

ENTRY_POINT_GROUP = "meshwarden.board_drivers"

_DRIVERS: dict[str, tuple[str, str]] = {
    "reference": ("meshwarden.drivers.reference", "ReferenceDriver"),
    "scpi": ("meshwarden.drivers.scpi", "ScpiDriver"),
}


def register_driver(name: str, module: str, class_name: str) -> None:
    """Make ``driver: name`` mean ``module.class_name``."""
    _DRIVERS[name] = (module, class_name)


def known_drivers() -> dict[str, tuple[str, str]]:
    out = dict(_DRIVERS)
    for entry in entry_points(group=ENTRY_POINT_GROUP):
        module, _, attr = entry.value.partition(":")
        out.setdefault(entry.name, (module, attr))
    return out


def create_driver(board: BoardConfig) -> BoardDriver:
    """An unopened driver of the board's configured type."""
    drivers = known_drivers()
    if board.driver not in drivers:
        known = ", ".join(sorted(drivers))
        raise ConfigError(
            [
                ConfigIssue(
                    "<config>",
                    0,
                    f"rack.boards.{board.id}.driver",
                    f"unknown board driver '{board.driver}' (known: {known})",
                )
            ]
        )
    module, class_name = drivers[board.driver]
    cls = getattr(importlib.import_module(module), class_name)
    driver: BoardDriver = cls(board)
    return driver
