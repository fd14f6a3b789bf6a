"""The `meshwarden` command line.

Exit codes (stable, scripts rely on them): 0 ok, 1 refused by the daemon, 2 usage or
configuration error, 3 daemon unreachable, 130 interrupted (Ctrl-C; a ramp was asked to stop).
No traceback reaches the user: every expected error is a :class:`MeshwardenError` printed as one
line; anything else is reported as an internal error with a hint to run with ``--debug``.

The commands live in small modules: ``cli_serve`` (serve, check-config), ``cli_motion`` (set,
disarm, restore, followed to their end), ``cli_settings`` (save, load), ``cli_watch`` (live
telemetry), ``cli_tables`` (readable output), ``cli_common`` (finding the daemon, timeouts).
"""

from __future__ import annotations

import argparse
import json
import os
import sys
from collections.abc import Sequence
from typing import Any

from meshwarden import __version__
from meshwarden.cli_common import UsageError, add_client_options, loaded_config, open_client
from meshwarden.errors import MeshwardenError, UnreachableError
from meshwarden.logsetup import configure_logging

EXIT_OK, EXIT_REFUSED, EXIT_USAGE, EXIT_UNREACHABLE, EXIT_INTERRUPTED = 0, 1, 2, 3, 130
ARM_CAUTION = "outputs may now rise to their limits (tens of volts): keep clear of probes and pads"


class _Parser(argparse.ArgumentParser):
    """argparse that exits with our usage code (2) and a one-line message."""

    def error(self, message: str) -> None:  # type: ignore[override]
        self.print_usage(sys.stderr)
        print(f"{self.prog}: error: {message}", file=sys.stderr)
        raise SystemExit(EXIT_USAGE)


def _cmd_keygen(args: argparse.Namespace) -> int:
    from pathlib import Path

    from meshwarden.service.keyfiles import write_keypair

    public, secret = write_keypair(Path(args.dir), args.name)
    print(f"public key: {public}\nsecret key: {secret} (mode 0600: readable by you only; keep it so)")
    return EXIT_OK


def _request_args(args: argparse.Namespace) -> dict[str, Any]:
    op = args.command
    if op == "monitors":
        return {"average": args.average, "integration_s": args.integration}
    if op == "estop":
        return {"reason": args.reason}
    if op == "recover":
        return {"board": args.board}
    if op == "events":
        return {"since": args.since, "limit": args.limit}
    if op == "cancel":
        return {"job": args.job}
    if op == "lease":
        return {"targets": args.targets, "ttl_s": args.ttl}
    if op == "release":
        return {"targets": args.targets}
    return {}


def _cmd_request(args: argparse.Namespace) -> int:
    """One request, one reply, printed as a table or JSON."""
    from meshwarden.cli_tables import render

    with open_client(args) as client:
        result = client.request(args.command, **_request_args(args))
    try:
        print(json.dumps(result, indent=2, sort_keys=True, default=str) if args.json else render(args.command, result))
        if args.command == "arm" and not args.json:
            print(f"caution: {ARM_CAUTION}")
    except BrokenPipeError:
        sys.stderr.close()
    return EXIT_OK


def _cmd_estop(args: argparse.Namespace) -> int:
    try:
        return _cmd_request(args)
    except UnreachableError as exc:
        print(f"meshwarden: unreachable: {exc.message}: the emergency stop was NOT delivered", file=sys.stderr)
        config = loaded_config(args)
        if config is not None:
            from meshwarden.service.daemon import watchdog_plan

            for line in watchdog_plan(config):
                print(f"meshwarden: {line}", file=sys.stderr)
        else:
            print(
                "meshwarden: without a daemon, each board's watchdog acts on its own once heartbeats stop: "
                "'ramp_to_zero' boards ramp to zero after their watchdog timeout, 'hold' boards keep their "
                "voltage (give --config to see this rack's plan)",
                file=sys.stderr,
            )
        print("meshwarden: to be safe now, switch the driver rack off", file=sys.stderr)
        return EXIT_UNREACHABLE


def build_parser() -> argparse.ArgumentParser:
    from meshwarden.cli_motion import cmd_ramp_op, cmd_set
    from meshwarden.cli_serve import cmd_check_config, cmd_serve
    from meshwarden.cli_settings import cmd_load, cmd_save
    from meshwarden.cli_sweep import cmd_sweep
    from meshwarden.cli_watch import TOPICS, cmd_watch

    parser = _Parser(
        prog="meshwarden",
        description="Control daemon for MEMS photonic chips. Client commands find the daemon from --endpoint, "
        "MESHWARDEN_ENDPOINT, --config's service section, ~/.config/meshwarden/client.yaml, else "
        "tcp://127.0.0.1:7640.",
    )
    parser.add_argument("--version", action="version", version=f"meshwarden {__version__}")
    parser.add_argument(
        "--log-format",
        choices=("auto", "console", "json"),
        default="auto",
        help="log output: console on a terminal, JSON lines otherwise (default: auto)",
    )
    parser.add_argument("--debug", action="store_true", help="show tracebacks of internal errors")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    check = sub.add_parser("check-config", help="validate a configuration file, summarise it and list its cautions")
    check.add_argument("path", help="the top configuration file (YAML)")
    check.set_defaults(run=cmd_check_config)

    serve = sub.add_parser("serve", help="run the daemon (no --config: the demo on a simulated rack)")
    serve.add_argument("--config", help="the top configuration file (default: the shipped demo, simulated)")
    serve.add_argument("--ports-file", help='JSON {"board_id": "url"} overriding board URLs (meshsim serve writes one)')
    serve.add_argument("--bind", help="command endpoint (default from the configuration)")
    serve.add_argument("--pub", help="telemetry endpoint (default from the configuration)")
    serve.add_argument("--run-token", help="a token `status` reports, so a launcher can recognise its own daemon")
    serve.add_argument(
        "--shutdown",
        choices=("hold", "ramp_to_zero"),
        default="hold",
        help="outputs at shutdown: hold for the next start to adopt (default; they stay live), or ramp to zero",
    )
    serve.add_argument(
        "--calibration",
        metavar="VERSION",
        help="make VERSION the active calibration before starting ('config': the configuration's own tables)",
    )
    serve.set_defaults(run=cmd_serve)

    keygen = sub.add_parser("keygen", help="create a CURVE key pair for the daemon or a client")
    keygen.add_argument("name", help="file name stem, e.g. the client's name")
    keygen.add_argument("--dir", default=".", help="folder for NAME.key and NAME.key_secret")
    keygen.set_defaults(run=_cmd_keygen)

    def client_command(name: str, text: str, run: Any = _cmd_request) -> argparse.ArgumentParser:
        cmd = sub.add_parser(name, help=text)
        add_client_options(cmd)
        cmd.set_defaults(run=run)
        return cmd

    client_command("status", "daemon state, outputs live, boards, jobs")
    client_command("arm", "allow outputs to change (clears an estop)")
    client_command("disarm", "ramp every output to zero", cmd_ramp_op)
    client_command("estop", "emergency stop: zero every board now", _cmd_estop).add_argument(
        "--reason", default="command line", help="recorded in the journal"
    )
    client_command("restore", "ramp reset boards back to their journaled targets", cmd_ramp_op)
    setter = client_command("set", "set actuators or gates: ID=VALUE ... (units: V, mV, rad, mrad, deg)", cmd_set)
    setter.add_argument(
        "pairs",
        nargs="*",
        metavar="ID=VALUE",
        help="actuator id (phase rad / coupling 0..1), GATE.kappa= or GATE.phase=; 'p05=90 deg', 'c03=12 V'",
    )
    setter.add_argument("--volts", action="store_true", help="values without a unit are volts")
    setter.add_argument("--from", dest="source", metavar="FILE", help="values from `get --json` output or a saved file")
    client_command("get", "every actuator's state, grouped by gate")
    monitors = client_command("monitors", "read the photodetector monitors")
    monitors.add_argument("--average", type=int, default=1, help="reads to average (default 1)")
    monitors.add_argument("--integration", type=float, default=1e-3, help="seconds per read (default 0.001)")
    client_command("recover", "bring a faulted board back after its link was fixed").add_argument("board")
    events = client_command("events", "journal events, oldest first")
    events.add_argument("--since", type=int, default=0, help="only events after this id")
    events.add_argument("--limit", type=int, default=100, help="at most this many (1..1000, default 100)")
    client_command("jobs", "recent jobs and their state")
    client_command("cancel", "stop a running job (between ramp steps)").add_argument(
        "job", help="the job id, e.g. job-3"
    )
    lease = client_command("lease", "hold actuators or gates for this client id (see --client-id)")
    lease.add_argument("targets", nargs="+", metavar="ID")
    lease.add_argument("--ttl", type=float, default=30.0, help="seconds until the lease lapses (default 30)")
    client_command("release", "give leased actuators back").add_argument("targets", nargs="+", metavar="ID")
    watch = client_command("watch", f"live telemetry ({', '.join(TOPICS)}); Ctrl-C ends", cmd_watch)
    watch.add_argument("topics", nargs="*", metavar="TOPIC", help="topics to show (default: all)")
    watch.add_argument("--count", type=int, default=0, help="stop after this many messages")
    watch.add_argument("--duration", type=float, help="stop after this many seconds")
    save = client_command("save", "save every actuator's setting under NAME (or a .json path)", cmd_save)
    save.add_argument("name")
    save.add_argument("--force", action="store_true", help="replace an existing file")
    load = client_command("load", "ramp to saved settings NAME through the guard", cmd_load)
    load.add_argument("name")
    load.add_argument("--volts", action="store_true", help="load the saved volts rather than the logical values")
    from meshwarden.cli_calibrate import add_parsers as add_calibration_commands

    add_calibration_commands(sub, client_command)
    sweep = client_command("sweep", "step settings over a grid, read monitors at each point, write CSV", cmd_sweep)
    sweep.add_argument("axes", nargs="+", metavar="ID=START:STOP:POINTS", help="e.g. p05=0:6.28:25 (first: slowest)")
    sweep.add_argument("--out", required=True, help="CSV file for the rows")
    sweep.add_argument("--monitors", help="comma-separated monitor ids (default: all)")
    sweep.add_argument("--average", type=int, default=1, help="reads to average per point (default 1)")
    sweep.add_argument("--integration", type=float, default=1e-3, help="seconds per read (default 0.001)")
    sweep.add_argument("--volts", action="store_true", help="the ranges are volts")
    from meshwarden import cli_scan

    cli_scan.add_parsers(sub)
    from meshwarden import cli_lock

    cli_lock.add_parsers(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "run", None):
        parser.print_help(sys.stderr)
        return EXIT_USAGE
    configure_logging(args.log_format)
    client_command = hasattr(args, "retries")
    try:
        code: int = args.run(args)
        return code
    except UnreachableError as exc:
        print(f"meshwarden: unreachable: {exc.message}", file=sys.stderr)
        return EXIT_UNREACHABLE
    except UsageError as exc:
        print(f"meshwarden: {exc.message}", file=sys.stderr)
        return EXIT_USAGE
    except MeshwardenError as exc:
        print(f"meshwarden: {exc.code}: {exc.message}", file=sys.stderr)
        return EXIT_REFUSED if client_command and exc.code != "config" else EXIT_USAGE
    except KeyboardInterrupt:
        print("meshwarden: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED
    except BrokenPipeError:
        # `meshwarden ... | head`: the reader left; say nothing more on a closed pipe
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return EXIT_OK
    except Exception as exc:  # the last line of defence: no traceback for the user
        if args.debug:
            raise
        print(
            f"meshwarden: internal error: {type(exc).__name__}: {exc} (run with --debug for details)", file=sys.stderr
        )
        return EXIT_USAGE


if __name__ == "__main__":
    raise SystemExit(main())
