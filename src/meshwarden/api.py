"""Using the controller in-process: tests, notebooks and the daemon itself.

    async with open_controller(load_config("lab.yaml")) as ctl:
        await ctl.arm()
        await ctl.set({"g05.kappa": 0.5, "g05.phase": 1.2})
        print(await ctl.read_monitors(average=4))

``ports`` overrides board URLs (the ``{"board_id": "url"}`` object that ``meshsim serve
--ports-file`` writes). Leaving the block stops the board threads and closes the journal;
outputs stay where they are, for the next start to adopt.
"""

from __future__ import annotations

import dataclasses
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager

from meshwarden.config.model import Config, RackConfig
from meshwarden.controller import Controller
from meshwarden.drivers.rack import Rack
from meshwarden.errors import ConfigError, ConfigIssue
from meshwarden.journal import Journal
from meshwarden.rackstate import ceiling_codes


def with_ports(config: Config, ports: dict[str, str]) -> Config:
    """The configuration with board URLs replaced from ``ports``; unknown boards are an error."""
    unknown = sorted(set(ports) - {b.id for b in config.rack.boards})
    if unknown:
        raise ConfigError([ConfigIssue("<ports>", 0, "", f"no board '{unknown[0]}' in the configuration")])
    boards = tuple(dataclasses.replace(b, url=ports.get(b.id, b.url)) for b in config.rack.boards)
    return dataclasses.replace(config, rack=RackConfig(boards))


@asynccontextmanager
async def open_controller(config: Config, ports: dict[str, str] | None = None) -> AsyncIterator[Controller]:
    """A started controller for ``config``; stopped (outputs untouched) when the block ends."""
    if ports:
        config = with_ports(config, ports)
    journal = Journal(config.journal.path)
    rack = Rack(config.rack, ceilings=ceiling_codes(config))
    controller = Controller(config, rack, journal)
    try:
        await controller.start()
        yield controller
    finally:
        await controller.close()
        journal.close()
