"""The `meshsim` command line: serve a simulated rack, or compute design-nominal calibration."""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence
from pathlib import Path

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


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="meshsim", description="Simulated MEMS driver rack and photonic chip.")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
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
    except (ScenarioError, ParamsError) as exc:
        print(f"meshsim: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":
    raise SystemExit(main())
