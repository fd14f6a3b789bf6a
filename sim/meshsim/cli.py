"""The `meshsim` command line: serve a simulated rack, or compute design-nominal calibration."""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence
from pathlib import Path

from meshsim.faults import FaultSpecError
from meshsim.params import ParamsError, parse_params
from meshsim.scenario import ScenarioError, load_scenario


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> None:  # type: ignore[override]
        self.print_usage(sys.stderr)
        print(f"{self.prog}: error: {message}", file=sys.stderr)
        raise SystemExit(2)


def _cmd_nominal(args: argparse.Namespace) -> int:
    from meshsim.nominal import write_nominal_tables

    scenario = load_scenario(args.config)
    params = parse_params(scenario.simulator)
    count = write_nominal_tables(scenario, params, Path(args.out), args.step_volts)
    print(f"wrote {count} design-nominal calibration files to {args.out}")
    return 0


def _cmd_serve(args: argparse.Namespace) -> int:
    import signal
    import threading

    from meshsim.clock import SimClock
    from meshsim.rack import SimRack
    from meshsim.serve import RackServer

    rack = SimRack.from_config(args.config, seed=args.seed, faults=args.faults or "", clock=SimClock(args.time_scale))
    stop = threading.Event()
    for sig in (signal.SIGINT, signal.SIGTERM):
        signal.signal(sig, lambda *_: stop.set())
    with RackServer(rack, args.transport) as server:
        server.write_ports_file(args.ports_file)
        ports = ", ".join(f"{b}={u}" for b, u in server.ports().items())
        print(
            f"meshsim: serving {len(server.links)} board{'s' if len(server.links) != 1 else ''} over "
            f"{args.transport}: {ports}",
            file=sys.stderr,
            flush=True,
        )
        while not stop.wait(0.2):
            pass
    print("meshsim: stopped", file=sys.stderr, flush=True)
    return 0


def _positive(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
    if not value > 0:
        raise argparse.ArgumentTypeError(f"must be positive, got {text}")
    return value


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="meshsim", description="Simulated MEMS driver rack and photonic chip.")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    serve = sub.add_parser("serve", help="serve a simulated rack over ptys or TCP until stopped")
    serve.add_argument("--config", required=True, help="the configuration (rack, chip and simulator sections)")
    serve.add_argument("--transport", choices=("pty", "tcp"), default="pty", help="pty devices or TCP on 127.0.0.1")
    serve.add_argument("--ports-file", required=True, help='write {"board_id": "url", ...} here once ready')
    serve.add_argument("--seed", type=int, default=None, help="override the simulator section's seed")
    serve.add_argument("--faults", default="", help="faults to inject, e.g. 'stuck:c03;corrupt:*=0.01'")
    serve.add_argument("--time-scale", type=_positive, default=1.0, help="simulated seconds per wall second")
    serve.set_defaults(run=_cmd_serve)
    nominal = sub.add_parser("nominal-calibration", help="write design-nominal calibration tables")
    nominal.add_argument("--config", required=True, help="the configuration (with a simulator section)")
    nominal.add_argument("--out", required=True, help="folder for one file per actuator")
    nominal.add_argument("--step-volts", type=float, default=0.5, help="table spacing in volts (default 0.5)")
    nominal.set_defaults(run=_cmd_nominal)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "run", None):
        parser.print_help(sys.stderr)
        return 2
    try:
        code: int = args.run(args)
        return code
    except (ScenarioError, ParamsError, FaultSpecError, OSError) as exc:
        print(f"meshsim: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":
    raise SystemExit(main())
