"""Helper process for the kill -9 tests: arm, set targets, report, then keep running until killed;
with ``estop`` as a third argument, stop at once after the report and kill itself the instant the
emergency stop has answered (the narrowest crash a stop can meet)."""

from __future__ import annotations

import asyncio
import json
import os
import signal
import sys

from meshwarden.api import open_controller
from meshwarden.config import load_config
from meshwarden.logsetup import configure_logging


async def main(config_path: str, ports_json: str, then: str) -> None:
    async with open_controller(load_config(config_path), json.loads(ports_json)) as ctl:
        await ctl.arm()
        applied = await ctl.set({"c0": 21.0, "p0": 13.0, "c1": 7.0}, volts=True)
        print("READY " + json.dumps({a: r["code"] for a, r in applied.items()}), flush=True)
        if then == "estop":
            await ctl.estop(reason="test")
            os.kill(os.getpid(), signal.SIGKILL)
        while True:
            await asyncio.sleep(1.0)


if __name__ == "__main__":
    configure_logging("json", stream=sys.stderr)
    asyncio.run(main(sys.argv[1], sys.argv[2], sys.argv[3] if len(sys.argv) > 3 else "hold"))
