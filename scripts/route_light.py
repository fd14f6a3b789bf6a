"""Example experiment script: route the laser from input mode 0 to one chosen output of the demo chip.

It talks to a running daemon over the bus with the client library only, as a lab script would:
arm, read the output monitors, switch the gates on a path to cross state in one request, read
again, show the result, disarm. The demo chip's lattice (config/demo/simulator.yaml) has 16
modes and 8 columns; even columns have gates on modes (0,1), (2,3) ...; odd ones on (1,2), (3,4) ...
A gate at kappa ~ 0 passes light straight on ("bar"); at kappa ~ 1 it swaps the two modes ("cross").
"""

from __future__ import annotations

import argparse
import sys
from typing import Any

from meshwarden.client import Client
from meshwarden.errors import MeshwardenError

MODES, COLUMNS = 16, 8
OUTPUT_MONITOR_BASE = 32  # monitors m32..m47 are the taps after the last column, modes 0..15


def gate_ids() -> list[dict[int, str]]:
    """Per column: top mode -> gate id, numbered as in the demo configuration."""
    columns, n = [], 0
    for col in range(COLUMNS):
        column = {}
        for top in range(col % 2, MODES - 1, 2):
            column[top] = f"g{n:02d}"
            n += 1
        columns.append(column)
    return columns


GATES = [gate for column in gate_ids() for gate in column.values()]


def schedules(target_mode: int, start_mode: int = 0) -> list[tuple[list[str], list[str]]]:
    """Every way through the columns from ``start_mode`` to ``target_mode``: (gates switched to
    cross, gates the light passes in bar state). In each column the light either crosses to the
    neighbouring mode (if a gate joins them there) or stays, in a gate at rest or in no gate."""
    step = 1 if target_mode >= start_mode else -1
    found: list[tuple[list[str], list[str]]] = []

    def walk(column: int, mode: int, crosses: list[str], bars: list[str]) -> None:
        if column == COLUMNS:
            if mode == target_mode:
                found.append((crosses, bars))
            return
        gates = gate_ids()[column]
        top = mode if step > 0 else mode - 1
        if mode != target_mode and top in gates:
            walk(column + 1, mode + step, [*crosses, gates[top]], bars)
        resting = gates.get(mode, gates.get(mode - 1))
        walk(column + 1, mode, crosses, bars + ([resting] if resting else []))

    walk(0, start_mode, [], [])
    return found


def path_to(target_mode: int, start_mode: int = 0, reachable: dict[str, list[float]] | None = None) -> list[str]:
    """Gates to switch to cross so that light entering at ``start_mode`` leaves at ``target_mode``.

    Every gate on the way loses light: a crossing one the part it cannot couple over (1 - its
    highest kappa), a resting one the part it still couples at 0 V (its lowest kappa). With the
    daemon's ``reachable`` ranges of the couplers (``get``), the way that keeps the most light
    wins; without them, the way that passes the fewest resting gates."""
    ways = schedules(target_mode, start_mode)
    if not ways:
        raise SystemExit(f"mode {target_mode} cannot be reached from mode {start_mode} in {COLUMNS} columns")

    def kept(way: tuple[list[str], list[str]]) -> float:
        crosses, bars = way
        if reachable is None:
            return -float(len(bars))
        light = 1.0
        for gate in crosses:
            light *= min(reachable[f"c{gate[1:]}"][1], 1.0)
        for gate in bars:
            light *= 1.0 - max(reachable[f"c{gate[1:]}"][0], 0.0)
        return light

    crosses, _ = max(ways, key=lambda way: (kept(way), [-int(g[1:]) for g in way[0]]))
    return crosses


def outputs(mw: Client) -> list[float]:
    reading = mw.monitors(average=4, integration_s=2e-3)
    return [reading[f"m{OUTPUT_MONITOR_BASE + k:02d}"]["watts"] for k in range(MODES)]


def show(title: str, powers: list[float], target: int) -> None:
    top = max(powers) or 1.0
    print(f"\n{title}")
    for k, p in enumerate(powers):
        bar = "#" * int(40 * p / top)
        mark = "  <- target" if k == target else ""
        print(f"  out{k:>2} (m{OUTPUT_MONITOR_BASE + k}) {p * 1e6:9.3f} uW  {bar}{mark}")


def check_rack(mw: Client, args: argparse.Namespace, path: list[str]) -> str | None:
    """Why this daemon is not the demo rack the script expects (None when it is). Checked before
    anything is armed: an example script must never arm a rack it was not written for."""
    status = mw.status()
    if args.expect_token and status.get("run_token") != args.expect_token:
        return f"the daemon on {args.endpoint} is not the one started with run token {args.expect_token}"
    boards = sorted(status["boards"])
    if boards != sorted(args.expect_boards.split(",")):
        return f"the daemon on {args.endpoint} drives boards {', '.join(boards)}, not {args.expect_boards}"
    if status["estopped"]:
        return "that rack's emergency stop is latched; this script will not clear someone's emergency stop"
    if status["armed"]:
        return "that rack is already armed by someone else; this script arms and disarms its own session"
    view = mw.get()
    missing = [g for g in path if g not in view.get("gates", {})]
    if missing:
        return f"the rack has no gate {missing[0]}: it is not the demo chip"
    return None


def set_reaching(mw: Client, request: dict[str, float]) -> dict[str, Any]:
    """Set the request; a coupling ratio one coupler cannot reach is replaced by the highest it
    reaches (its refusal names the reachable range), and the whole request is sent again."""
    for _ in range(len(request) + 1):
        try:
            applied: dict[str, Any] = mw.set(request)["applied"]
            return applied
        except MeshwardenError as exc:
            reachable = exc.details.get("reachable")
            actuator = str(exc.details.get("actuator", ""))  # the demo chip: coupler cNN is gate gNN's
            name = next((n for n in request if n in (actuator, f"g{actuator[1:]}.kappa")), None)
            if exc.code != "out_of_range" or not reachable or name is None:
                raise
            request[name] = float(reachable[1])
            print(f"  {name}: {exc.message}; asking for {reachable[1]:.3f}")
    raise MeshwardenError("could not find a request every coupler can reach")


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--endpoint", default="tcp://127.0.0.1:7640")
    parser.add_argument("--telemetry", help="telemetry endpoint (default: the command port + 1)")
    parser.add_argument("--target", type=int, default=5, help="output mode to send the light to (default 5)")
    parser.add_argument("--expect-token", help="refuse unless the daemon reports this run token (serve --run-token)")
    parser.add_argument("--expect-boards", default="b0,b1", help="the rack's board ids (default: the demo's b0,b1)")
    args = parser.parse_args()
    path = path_to(args.target)
    try:
        with Client(args.endpoint, args.telemetry, timeout_s=5.0) as mw:
            status = mw.status()
            print(f"daemon {status['version']}: armed={status['armed']}, boards {', '.join(status['boards'])}")
            wrong = check_rack(mw, args, path)
            if wrong is not None:
                print(f"route_light: not arming: {wrong}", file=sys.stderr)
                return 2
            monitors = mw.monitors()
            absent = [
                f"m{OUTPUT_MONITOR_BASE + k:02d}"
                for k in range(MODES)
                if f"m{OUTPUT_MONITOR_BASE + k:02d}" not in monitors
            ]
            if absent:
                print(
                    f"route_light: not arming: the rack has no monitor {absent[0]}: not the demo chip", file=sys.stderr
                )
                return 2
            reach = {a: e["reachable"] for a, e in mw.get()["actuators"].items() if "reachable" in e}
            path = path_to(args.target, reachable=reach if all(f"c{g[1:]}" in reach for g in GATES) else None)
            print(f"path kept by the couplers' calibrated ranges: {', '.join(path)}")
            print("caution: arming - outputs may rise to their limits; keep clear of probes and pads")
            mw.arm()
            print("armed")
            before = outputs(mw)
            show("outputs with every gate in bar state (all actuators at 0 V):", before, 0)
            request = {f"{g}.kappa": 1.0 for g in path}
            print(f"\nswitching {', '.join(path)} to cross (kappa 1, or the highest each reaches) ...")
            applied = set_reaching(mw, request)
            for aid, a in sorted(applied.items()):
                print(f"  {aid}: {a['volts']:.3f} V (code {a['code']}, limit {a['limit_v']:g} V)")
            after = outputs(mw)
            show(f"outputs with the path to mode {args.target} switched:", after, args.target)
            share = after[args.target] / (sum(after) or 1.0)
            actuators = mw.get()["actuators"]
            versions = sorted({str(actuators[f"c{g[1:]}"].get("calibration_version")) for g in path})
            print(f"\n{share:.0%} of the output light now leaves at mode {args.target}")
            print(f"(calibration of the path's couplers: {', '.join(versions)})")
            mw.disarm()
            print("disarmed: every output ramped back to 0 V")
    except MeshwardenError as exc:
        print(f"route_light: {exc.code}: {exc.message}", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
