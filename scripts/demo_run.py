"""The demo: the daemon on the embedded simulated rack, and an experiment script that uses it.

1. `meshwarden check-config config/demo.yaml`
2. `meshwarden serve` with no configuration: the shipped demo on the in-process simulated rack
3. `scripts/route_light.py`: arm, route the laser to a chosen output, read monitors, disarm
4. the same daemon through the command line: status, a refused request, estop
5. SIGTERM: the daemon stops cleanly
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
CONFIG = REPO / "config" / "demo.yaml"
ENDPOINT = os.environ.get("MESHWARDEN_DEMO_ENDPOINT", "tcp://127.0.0.1:7640")


def step(title: str) -> None:
    print(f"\n=== {title}", flush=True)


def cli(*args: str) -> int:
    print("$ meshwarden " + " ".join(args), flush=True)
    return subprocess.run([sys.executable, "-m", "meshwarden.cli", *args]).returncode


def main() -> int:
    step("check the demo configuration")
    if cli("check-config", str(CONFIG)) != 0:
        return 2
    # The demo's simulated rack is new on every run, so the demo's own journal starts afresh too.
    for stale in (REPO / "var").glob("demo-journal.sqlite*"):
        stale.unlink()

    step("start the daemon on the embedded simulated rack")
    host, port = ENDPOINT.rsplit(":", 1)
    log = REPO / "var" / "demo-daemon.log"
    log.parent.mkdir(exist_ok=True)
    with log.open("w") as out:
        daemon = subprocess.Popen(
            [
                sys.executable,
                "-m",
                "meshwarden.cli",
                "--log-format",
                "json",
                "serve",
                "--bind",
                ENDPOINT,
                "--pub",
                f"{host}:{int(port) + 1}",
            ],
            stdout=out,
            stderr=out,
        )
    try:
        from meshwarden.client import Client
        from meshwarden.errors import UnreachableError

        with Client(ENDPOINT) as c:
            try:
                c.wait_ready(30.0)
            except UnreachableError:
                print(log.read_text(), file=sys.stderr)
                return 2
        print(f"meshwarden serve is up on {ENDPOINT} (log: {log.relative_to(REPO)})")

        step("experiment script: route the light (scripts/route_light.py)")
        result = subprocess.run([sys.executable, str(REPO / "scripts" / "route_light.py"), "--endpoint", ENDPOINT])
        if result.returncode != 0:
            return result.returncode

        step("the command line against the same daemon")
        cli("status", "--endpoint", ENDPOINT)
        print("(a request while disarmed is refused, exit code 1:)")
        code = cli("set", "g10.kappa=0.5", "--endpoint", ENDPOINT)
        print(f"exit code {code}")
        cli("estop", "--endpoint", ENDPOINT, "--reason", "end of demo")
    finally:
        step("stop the daemon (SIGTERM)")
        daemon.send_signal(signal.SIGTERM)
        try:
            daemon.wait(timeout=20)
        except subprocess.TimeoutExpired:
            daemon.kill()
        print(f"daemon exited with code {daemon.returncode}")
    return 0 if daemon.returncode == 0 else 1


if __name__ == "__main__":
    raise SystemExit(main())
