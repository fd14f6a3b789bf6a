"""Soak: random sequences against the daemon and a simulated rack over real ptys, checked at the boards.

Each sequence is a handful of random operations sent over the bus as an experiment script or
an operator would - set (volts, some above the limits, some left running as jobs), cancel,
disarm, estop, arm, restore, recover - mixed with link-fault bursts, board resets, and kill -9
of the daemon followed by a restart. After each sequence every write each board received is
checked against rules 1-3 (hard limit, step limit from the codes the board really held, dwell)
and rule 5 (no write between a daemon start and the first request that may write), with
limits recomputed from the configuration's numbers (meshwarden.writelog).

    scripts/soak --sequences 1000            # or --minutes 10
    scripts/soak --sequences 20 --seed 7 --json
    scripts/soak --driver scpi              # SCPI boards (the simulator's SCPI personality)

Prints counts: sequences, operations, writes checked, violations (must be 0), restarts.
Exit status 1 if any violation was seen.
"""

from __future__ import annotations

import argparse
import json
import os
import random
import signal
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from meshsim.faults import Fault
from meshsim.nominal import write_nominal_tables
from meshsim.params import parse_params
from meshsim.rack import SimRack
from meshsim.scenario import load_scenario
from meshsim.serve import RackServer
from meshwarden.client import Client
from meshwarden.config import load_config
from meshwarden.errors import MeshwardenError
from meshwarden.testing import free_port
from meshwarden.writelog import BoardLogChecker, LogCheck

# A small two-board bench of our own (invented numbers): four gates, dwell short enough for
# many ramps a second, link timeouts short enough that faults show quickly.
SOAK_CONFIG = """\
rack:
  boards:
    - {{id: b0, url: "socket://127.0.0.1:1", outputs: 16, monitor_inputs: 8, timeout_s: 0.1, retries: 4,
       driver: {driver}, error_rate_limit: 0.5, watchdog: {{timeout_s: 20, action: ramp_to_zero}}}}
    - {{id: b1, url: "socket://127.0.0.1:2", outputs: 16, monitor_inputs: 8, timeout_s: 0.1, retries: 4,
       driver: {driver}, error_rate_limit: 0.5, watchdog: {{timeout_s: 20, action: ramp_to_zero}}}}
chip:
  actuator_defaults:
    coupler: {{limit_volts: 40, pull_in_volts: 50, step_limit_volts: 2, dwell_s: 2 ms}}
    phase: {{limit_volts: 44, pull_in_volts: 55, step_limit_volts: 4, dwell_s: 3 ms}}
  actuators:
    - {{id: c0, kind: coupler, output: "b0:0"}}
    - {{id: p0, kind: phase, output: "b0:1"}}
    - {{id: c1, kind: coupler, output: "b0:4"}}
    - {{id: p1, kind: phase, output: "b0:5"}}
    - {{id: c2, kind: coupler, output: "b1:0"}}
    - {{id: p2, kind: phase, output: "b1:1"}}
    - {{id: c3, kind: coupler, output: "b1:2"}}
    - {{id: p3, kind: phase, output: "b1:7"}}
  gates:
    - {{id: g0, coupler: c0, phase: p0}}
    - {{id: g1, coupler: c1, phase: p1}}
    - {{id: g2, coupler: c2, phase: p2}}
    - {{id: g3, coupler: c3, phase: p3}}
  monitor_defaults: {{all: {{responsivity_a_per_w: 0.9, transimpedance_ohms: 100 kohm}}}}
  monitors:
    - {{id: m0, input: "b0:0"}}
    - {{id: m1, input: "b1:0"}}
calibration:
  directory: cal
journal:
  path: journal.sqlite
simulator:
  personality: {driver}  # the simulated boards speak what the driver speaks
  seed: {seed}
  laser: {{wavelength_nm: 1550, power_mw: 1.0, input_modes: [0]}}
  lattice:
    modes: 4
    columns:
      - {{g0: 0, g1: 2}}
      - {{g2: 1}}
      - {{g3: 0}}
    taps: {{m0: [1, 0], m1: [3, 1]}}
"""

ACTUATORS = ["c0", "p0", "c1", "p1", "c2", "p2", "c3", "p3"]
LINK_FAULTS = ("corrupt", "drop", "repeat", "garbage", "delay")


@dataclass
class Counts:
    sequences: int = 0
    operations: int = 0
    refused: int = 0
    restarts: int = 0
    resets: int = 0
    fault_bursts: int = 0
    check: LogCheck = field(default_factory=LogCheck)

    def as_dict(self) -> dict[str, Any]:
        return {
            "sequences": self.sequences,
            "operations": self.operations,
            "refused_or_failed": self.refused,
            "restarts": self.restarts,
            "board_resets": self.resets,
            "fault_bursts": self.fault_bursts,
            "writes_checked": self.check.writes,
            "violations": len(self.check.violations),
            "first_violations": [str(v) for v in self.check.violations[:10]],
        }


class Soak:
    """The rack, the daemon process and the checkers of one soak run."""

    def __init__(self, folder: Path, seed: int, log: Path, driver: str = "reference") -> None:
        self.folder = folder
        self.rng = random.Random(seed)
        self.config_path = folder / "soak.yaml"
        self.config_path.write_text(SOAK_CONFIG.format(seed=seed, driver=driver), encoding="utf-8")
        scenario = load_scenario(self.config_path)
        write_nominal_tables(scenario, parse_params(scenario.simulator), folder / "cal")
        self.config = load_config(self.config_path)
        self.rack = SimRack.from_config(self.config_path, seed=seed)
        self.server = RackServer(self.rack, "pty").start()
        self.ports_file = folder / "ports.json"
        self.ports_file.write_text(json.dumps(self.server.ports()))
        self.counts = Counts()
        self.checkers = {b.id: BoardLogChecker(self.config, b.id, self.counts.check) for b in self.config.rack.boards}
        self.log = log
        self.proc: subprocess.Popen[bytes] | None = None
        self.endpoint = ""
        self.start_window: float | None = None

    # ------------------------------------------------------------------ the daemon

    def start_daemon(self) -> None:
        self.endpoint = f"tcp://127.0.0.1:{free_port()}"
        pub = f"tcp://127.0.0.1:{free_port()}"
        args = [sys.executable, "-m", "meshwarden.cli", "--log-format", "json", "serve", "--config"]
        args += [str(self.config_path), "--ports-file", str(self.ports_file), "--bind", self.endpoint, "--pub", pub]
        self.start_window = self.rack.clock.now()
        with self.log.open("ab") as out:
            self.proc = subprocess.Popen(args, stdout=out, stderr=subprocess.STDOUT, env=dict(os.environ))
        with self.client() as probe:
            probe.wait_ready(60.0)

    def kill_daemon(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(signal.SIGKILL)
            self.proc.wait()

    def stop_daemon(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(timeout=20)
            except subprocess.TimeoutExpired:
                self.kill_daemon()

    def client(self) -> Client:
        return Client(self.endpoint, timeout_s=5.0, retries=1)

    def may_write_from_now(self) -> None:
        """The first request that may write after a start closes the rule-5 window."""
        if self.start_window is not None:
            window = (self.start_window, self.rack.clock.now())
            for checker in self.checkers.values():
                checker.no_write_windows.append(window)
            self.start_window = None

    # ------------------------------------------------------------------ one sequence

    def sequence(self, length: int) -> None:
        with self.client() as mw:
            jobs: list[str] = []
            for _ in range(length):
                self.counts.operations += 1
                try:
                    self.operation(mw, jobs)
                except _Restarted:
                    break  # this client's daemon is gone; the next sequence talks to the new one
                except MeshwardenError:
                    self.counts.refused += 1
        self.clear_faults()
        self.check()
        self.counts.sequences += 1

    def operation(self, mw: Client, jobs: list[str]) -> None:
        rng = self.rng
        op = rng.choices(
            ["set", "set_nowait", "cancel", "arm", "disarm", "estop", "restore", "faults", "reset", "restart"],
            weights=[30, 12, 8, 14, 5, 3, 3, 4, 2, 1],
        )[0]
        if op in ("set", "set_nowait"):
            chosen = rng.sample(ACTUATORS, rng.randint(1, len(ACTUATORS)))
            values = {a: round(rng.uniform(0.0, 46.0), 3) for a in chosen}
            self.may_write_from_now()
            reply = mw.set(values, volts=True, wait=op == "set")
            if op == "set_nowait":
                jobs.append(reply["job"])
        elif op == "cancel" and jobs:
            time.sleep(rng.uniform(0.0, 0.05))
            mw.cancel(jobs.pop(rng.randrange(len(jobs))))
        elif op == "arm":
            status = mw.status()
            for board, state in status["boards"].items():
                if state["faulted"] and not status["armed"]:
                    mw.recover(board)
            mw.arm()
        elif op == "disarm":
            self.may_write_from_now()
            mw.disarm()
        elif op == "estop":
            self.may_write_from_now()
            mw.estop(reason="soak")
        elif op == "restore":
            self.may_write_from_now()
            mw.restore()
        elif op == "faults":
            self.counts.fault_bursts += 1
            kind = rng.choice(LINK_FAULTS)
            self.rack.inject(Fault(kind, rng.choice(["b0", "b1", "*"]), rng.uniform(0.01, 0.15), 0.3))
        elif op == "reset":
            self.counts.resets += 1
            board = rng.choice(["b0", "b1"])
            with self.rack.lock:
                self.rack.board(board).power_cycle(self.rack.clock.now())
        elif op == "restart":
            time.sleep(rng.uniform(0.0, 0.05))  # often in the middle of a ramp
            self.counts.restarts += 1
            self.kill_daemon()
            self.clear_faults()
            self.start_daemon()
            raise _Restarted

    def restart_mid_ramp(self) -> None:
        """Arm, start a long ramp, and kill -9 the daemon while it runs; then start it again."""
        with self.client() as mw:
            try:
                mw.arm()
                self.may_write_from_now()
                mw.set({a: 30.0 for a in ACTUATORS}, volts=True, wait=False)
            except MeshwardenError:
                self.counts.refused += 1
        time.sleep(self.rng.uniform(0.01, 0.04))
        self.counts.restarts += 1
        self.kill_daemon()
        self.start_daemon()

    def clear_faults(self) -> None:
        with self.rack.lock:
            for link in self.rack.links.values():
                link.rates.clear()

    def check(self) -> None:
        for board_id, checker in self.checkers.items():
            with self.rack.lock:
                board = self.rack.board(board_id)
                entries = list(board.write_log)
                board.write_log.clear()
            checker.feed(entries)

    def close(self) -> None:
        self.stop_daemon()
        self.server.stop()
        self.check()


class _Restarted(MeshwardenError):
    """The daemon was restarted: the client of this sequence talks to a process that is gone."""

    def __init__(self) -> None:
        super().__init__("daemon restarted")


def run_soak(
    sequences: int,
    seed: int,
    minutes: float | None = None,
    length: int = 8,
    restart_every: int | None = None,
    driver: str = "reference",
) -> dict[str, Any]:
    """Run the soak; the counts as a dict (``violations`` must be 0). ``restart_every``: also
    kill -9 and restart the daemon in the middle of a ramp after every that many sequences."""
    with tempfile.TemporaryDirectory(prefix="meshwarden-soak-") as tmp:
        folder = Path(tmp)
        soak = Soak(folder, seed, folder / "daemon.log", driver)
        started = time.monotonic()
        try:
            soak.start_daemon()
            deadline = started + minutes * 60 if minutes else None
            while (deadline is None and soak.counts.sequences < sequences) or (
                deadline is not None and time.monotonic() < deadline
            ):
                soak.sequence(length)
                if restart_every and soak.counts.sequences % restart_every == 0:
                    soak.restart_mid_ramp()
        finally:
            soak.close()
        result = soak.counts.as_dict()
        result["seconds"] = round(time.monotonic() - started, 1)
        result["seed"] = seed
        return result


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sequences", type=int, default=100, help="how many random sequences (default 100)")
    parser.add_argument("--minutes", type=float, help="run for this long instead of a count")
    parser.add_argument("--seed", type=int, default=20261202, help="random seed (default 20261202)")
    parser.add_argument("--length", type=int, default=8, help="operations per sequence (default 8)")
    parser.add_argument("--restart-every", type=int, help="also kill -9 mid-ramp after every N sequences")
    parser.add_argument("--json", action="store_true", help="print the counts as JSON")
    parser.add_argument("--driver", choices=("reference", "scpi"), default="reference", help="board driver")
    args = parser.parse_args()
    result = run_soak(args.sequences, args.seed, args.minutes, args.length, args.restart_every, args.driver)
    if args.json:
        print(json.dumps(result, indent=2))
    else:
        for key, value in result.items():
            if key != "first_violations":
                print(f"{key:>20}: {value}")
        for line in result["first_violations"]:
            print("  " + line)
    sys.exit(1 if result["violations"] else 0)


if __name__ == "__main__":
    main()
