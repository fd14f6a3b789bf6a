"""The demo: the daemon on the embedded simulated rack, and an experiment script that uses it.

1. `meshwarden check-config` of the demo configuration (summary and cautions)
2. `meshwarden serve` with no configuration: the shipped demo on the in-process simulated rack,
   on free ports of its own and with a run token, so that it can never be confused with a
   daemon someone else started (a real rack's daemon may be on the usual port 7640)
3. `scripts/route_light.py`: arm, route the laser to a chosen output, read monitors, disarm -
   it checks the token and the rack's boards before it arms anything; then `meshwarden
   calibrate` measures the chip in place, and the same script runs again on the new tables
4. the same daemon through the command line: status, a refused request, estop
5. SIGTERM: the daemon stops cleanly and says what stays live

MESHWARDEN_DEMO_ENDPOINT=tcp://127.0.0.1:PORT asks for a port; if PORT (or PORT + 1, for
telemetry) is taken, the demo refuses to run rather than talk to whatever holds it.
"""

from __future__ import annotations

import os
import secrets
import shutil
import signal
import socket
import subprocess
import sys
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO / "src"))  # run from a checkout without installing, too

from meshwarden.service.daemon import demo_config_path  # noqa: E402

CONFIG = demo_config_path()
EXPECTED_BOARDS = "b0,b1"  # the demo rack (config/demo/rack.yaml)


def step(title: str) -> None:
    print(f"\n=== {title}", flush=True)


def cli(*args: str) -> int:
    print("$ meshwarden " + " ".join(args), flush=True)
    return subprocess.run([sys.executable, "-m", "meshwarden.cli", *args]).returncode


def port_free(port: int) -> bool:
    with socket.socket() as s:
        s.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        try:
            s.bind(("127.0.0.1", port))
        except OSError:
            return False
    return True


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def endpoints() -> tuple[str, str] | None:
    """The demo's own command and telemetry endpoints, or None when the asked-for ports are taken."""
    asked = os.environ.get("MESHWARDEN_DEMO_ENDPOINT")
    if not asked:
        command = free_port()
        telemetry = free_port()
        while telemetry == command:
            telemetry = free_port()
        return f"tcp://127.0.0.1:{command}", f"tcp://127.0.0.1:{telemetry}"
    host, port = asked.rsplit(":", 1)
    if not all(port_free(p) for p in (int(port), int(port) + 1)):
        return None
    return asked, f"{host}:{int(port) + 1}"


def relay_cautions(log: Path, seen: int) -> int:
    """Print the daemon's own cautions (its `meshwarden:` lines) that are new in its log."""
    lines = log.read_text(errors="replace").splitlines()
    for text in lines[seen:]:
        if text.startswith("meshwarden:"):
            print(f"  [daemon] {text[len('meshwarden: ') :]}")
    return len(lines)


def run_route(command: list[str]) -> str | None:
    """Run the routing script, its output shown as it comes; the share it reports (None: it failed)."""
    process = subprocess.Popen(command, stdout=subprocess.PIPE, text=True)
    share = None
    assert process.stdout is not None
    for line in process.stdout:
        print(line, end="", flush=True)
        if "of the output light now leaves at mode" in line:
            share = line.split()[0]
    return share if process.wait() == 0 else None


def main() -> int:
    step("check the demo configuration")
    if cli("check-config", str(CONFIG)) != 0:
        return 2
    chosen = endpoints()
    if chosen is None:
        print(
            f"demo: {os.environ['MESHWARDEN_DEMO_ENDPOINT']} (or the port after it) is taken by another process. "
            "The demo only ever talks to a daemon it started itself; it will not touch that one. "
            "Unset MESHWARDEN_DEMO_ENDPOINT to use free ports.",
            file=sys.stderr,
        )
        return 2
    endpoint, telemetry = chosen
    token = secrets.token_hex(8)
    var = REPO / "var"
    var.mkdir(exist_ok=True)
    # The demo's simulated rack is new on every run, so the demo's own journal starts afresh too.
    for stale in var.glob("demo-journal.sqlite*"):
        stale.unlink()
    shutil.rmtree(var / "calibration", ignore_errors=True)  # versions measured on an earlier rack

    step("start the daemon on the embedded simulated rack")
    log = var / "demo-daemon.log"
    env = dict(os.environ, XDG_DATA_HOME=str(var))  # an installed demo keeps its journal here too
    with log.open("w") as out:
        serve = ["serve", "--bind", endpoint, "--pub", telemetry, "--run-token", token]
        daemon = subprocess.Popen(
            [sys.executable, "-m", "meshwarden.cli", "--log-format", "json", *serve],
            stdout=out,
            stderr=out,
            env=env,
        )
    seen = 0
    try:
        from meshwarden.client import Client
        from meshwarden.errors import UnreachableError

        with Client(endpoint, telemetry) as c:
            try:
                status = c.wait_ready(30.0)
            except UnreachableError:
                print(log.read_text(), file=sys.stderr)
                return 2
        if daemon.poll() is not None or status.get("run_token") != token:
            print(f"demo: the daemon on {endpoint} is not the one this demo started; not touching it", file=sys.stderr)
            print(log.read_text(), file=sys.stderr)
            return 2
        print(f"meshwarden serve is up on {endpoint} (run token {token}; log: {log.relative_to(REPO)})")
        seen = relay_cautions(log, seen)

        step("experiment script: route the light (scripts/route_light.py)")
        route = [sys.executable, str(REPO / "scripts" / "route_light.py"), "--endpoint", endpoint]
        route += ["--telemetry", telemetry, "--expect-token", token, "--expect-boards", EXPECTED_BOARDS]
        before = run_route(route)
        if before is None:
            return 1
        ep = ["--endpoint", endpoint, "--telemetry", telemetry]
        step("calibrate the chip in place: the tables so far are design-nominal (meshwarden calibrate)")
        cli("arm", *ep)
        if cli("calibrate", *ep, "--ramp-timeout", "600") != 0:
            return 1
        cli("disarm", *ep)
        step("the same experiment with the measured tables")
        after = run_route(route)
        if after is None:
            return 1
        print(f"\nlight at the chosen output: {before} with the design-nominal tables, {after} after calibration")

        step("the command line against the same daemon")
        cli("status", *ep)
        print("(a request while disarmed is refused, exit code 1:)")
        code = cli("set", "g10.kappa=0.5", *ep)
        print(f"exit code {code}")
        cli("estop", *ep, "--reason", "end of demo")
    finally:
        step("stop the daemon (SIGTERM)")
        daemon.send_signal(signal.SIGTERM)
        try:
            daemon.wait(timeout=20)
        except subprocess.TimeoutExpired:
            daemon.kill()
        relay_cautions(log, seen)
        print(f"daemon exited with code {daemon.returncode}")
    return 0 if daemon.returncode == 0 else 1


if __name__ == "__main__":
    raise SystemExit(main())
