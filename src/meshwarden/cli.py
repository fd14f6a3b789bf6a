"""The `meshwarden` command line.

Exit codes (stable, scripts rely on them): 0 ok, 1 refused by the daemon, 2 usage or
configuration error, 3 daemon unreachable. No traceback reaches the user: every expected error
is a :class:`MeshwardenError` printed as one line; anything else is reported as an internal
error with a hint to run with ``--debug``.
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence
from pathlib import Path

from meshwarden import __version__
from meshwarden.errors import ConfigError, MeshwardenError, UnreachableError
from meshwarden.logsetup import configure_logging

EXIT_OK, EXIT_REFUSED, EXIT_USAGE, EXIT_UNREACHABLE = 0, 1, 2, 3
CLIENT_COMMANDS = ("status", "arm", "disarm", "estop", "restore", "set", "get", "monitors", "recover")


class _Parser(argparse.ArgumentParser):
    """argparse that exits with our usage code (2) and a one-line message."""

    def error(self, message: str) -> None:  # type: ignore[override]
        self.print_usage(sys.stderr)
        print(f"{self.prog}: error: {message}", file=sys.stderr)
        raise SystemExit(EXIT_USAGE)


def _cmd_check_config(args: argparse.Namespace) -> int:
    from meshwarden.config import load_config, summarize

    try:
        config = load_config(Path(args.path))
    except ConfigError as exc:
        for issue in exc.issues:
            print(issue, file=sys.stderr)
        return EXIT_USAGE
    print(summarize(config))
    return EXIT_OK


def _cmd_serve(args: argparse.Namespace) -> int:
    import asyncio
    import json as _json

    from meshwarden.config import load_config
    from meshwarden.service.daemon import demo_config_path, serve

    path = Path(args.config) if args.config else demo_config_path()
    if not path.exists():
        print(f"meshwarden: no configuration at {path} (give --config PATH)", file=sys.stderr)
        return EXIT_USAGE
    try:
        config = load_config(path)
    except ConfigError as exc:
        for issue in exc.issues:
            print(issue, file=sys.stderr)
        return EXIT_USAGE
    ports = None
    if args.ports_file:
        try:
            ports = _json.loads(Path(args.ports_file).read_text(encoding="utf-8"))
        except (OSError, ValueError) as exc:
            print(f"meshwarden: cannot read ports file {args.ports_file}: {exc}", file=sys.stderr)
            return EXIT_USAGE
        if not isinstance(ports, dict) or not all(isinstance(k, str) and isinstance(v, str) for k, v in ports.items()):
            print(f'meshwarden: {args.ports_file} must hold a JSON object {{"board_id": "url"}}', file=sys.stderr)
            return EXIT_USAGE

    def ready(bus: object) -> None:
        print(
            f"meshwarden: serving commands on {bus.bound}, telemetry on {bus.pub_bound}",  # type: ignore[attr-defined]
            file=sys.stderr,
            flush=True,
        )

    try:
        asyncio.run(serve(config, ports, args.bind, args.pub, ready, shutdown=args.shutdown))
    except ConfigError as exc:
        for issue in exc.issues:
            print(issue, file=sys.stderr)
        return EXIT_USAGE
    except MeshwardenError as exc:
        print(f"meshwarden: {exc.message}", file=sys.stderr)
        return EXIT_USAGE
    return EXIT_OK


def _cmd_keygen(args: argparse.Namespace) -> int:
    from meshwarden.service.keyfiles import write_keypair

    public, secret = write_keypair(Path(args.dir), args.name)
    print(f"public key: {public}\nsecret key: {secret} (mode 0600: readable by you only; keep it so)")
    return EXIT_OK


def _client(args: argparse.Namespace):  # type: ignore[no-untyped-def]
    from meshwarden.client import Client

    return Client(
        args.endpoint, timeout_s=args.timeout, retries=args.retries, key_file=args.key, server_key_file=args.server_key
    )


def _print(result: object, as_json: bool, table: str | None = None) -> None:
    import json as _json

    if as_json or table is None:
        print(_json.dumps(result, indent=2, sort_keys=True, default=str))
    else:
        print(table)


def _cmd_client(args: argparse.Namespace) -> int:
    from meshwarden.cli_tables import render
    from meshwarden.client import Client  # noqa: F401  (import errors surface here, not mid-call)

    op = args.command
    kwargs: dict[str, object] = {}
    if op == "set":
        values: dict[str, float] = {}
        for pair in args.pairs:
            key, sep, value = pair.partition("=")
            try:
                values[key] = float(value)
            except ValueError:
                print(f"meshwarden: set: expected ID=NUMBER, got {pair!r}", file=sys.stderr)
                return EXIT_USAGE
            if not sep or not key:
                print(f"meshwarden: set: expected ID=NUMBER, got {pair!r}", file=sys.stderr)
                return EXIT_USAGE
        kwargs = {"values": values, "volts": args.volts}
    elif op == "monitors":
        kwargs = {"average": args.average}
    elif op == "estop":
        kwargs = {"reason": args.reason}
    elif op == "recover":
        kwargs = {"board": args.board}
    with _client(args) as client:
        result = client.request(op, **kwargs)
    _print(result, args.json, None if args.json else render(op, result))
    return EXIT_OK


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="meshwarden", description="Control daemon for MEMS photonic chips.")
    parser.add_argument("--version", action="version", version=f"meshwarden {__version__}")
    parser.add_argument(
        "--log-format",
        choices=("auto", "console", "json"),
        default="auto",
        help="log output: console on a terminal, JSON lines otherwise (default: auto)",
    )
    parser.add_argument("--debug", action="store_true", help="show tracebacks of internal errors")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    check = sub.add_parser("check-config", help="validate a configuration file and summarise it")
    check.add_argument("path", help="the top configuration file (YAML)")
    check.set_defaults(run=_cmd_check_config)

    serve = sub.add_parser("serve", help="run the daemon (no --config: the demo on the simulated rack)")
    serve.add_argument("--config", help="the top configuration file (default: the shipped demo)")
    serve.add_argument("--ports-file", help='JSON {"board_id": "url"} overriding board URLs (meshsim serve writes one)')
    serve.add_argument("--bind", help="command endpoint (default from the configuration)")
    serve.add_argument("--pub", help="telemetry endpoint (default from the configuration)")
    serve.add_argument(
        "--shutdown",
        choices=("hold", "ramp_to_zero"),
        default="hold",
        help="outputs at shutdown: hold for the next start to adopt (default), or ramp to zero",
    )
    serve.set_defaults(run=_cmd_serve)

    keygen = sub.add_parser("keygen", help="create a CURVE key pair for the daemon or a client")
    keygen.add_argument("name", help="file name stem, e.g. the client's name")
    keygen.add_argument("--dir", default=".", help="folder for NAME.key and NAME.key_secret")
    keygen.set_defaults(run=_cmd_keygen)

    for name, text in (
        ("status", "daemon state"),
        ("arm", "allow outputs to change (clears an estop)"),
        ("disarm", "ramp every output to zero"),
        ("estop", "emergency stop: zero every board now"),
        ("restore", "ramp reset boards back to their journaled targets"),
        ("set", "set actuators or gates: ID=VALUE ..."),
        ("get", "every actuator's state"),
        ("monitors", "read the photodetector monitors"),
        ("recover", "bring a faulted board back after its link was fixed"),
    ):
        cmd = sub.add_parser(name, help=text)
        cmd.add_argument("--endpoint", default="tcp://127.0.0.1:7640", help="the daemon's command endpoint")
        cmd.add_argument("--json", action="store_true", help="machine-readable output")
        cmd.add_argument("--timeout", type=float, default=2.0, help="seconds per try (default 2)")
        cmd.add_argument("--retries", type=int, default=2, help="tries after the first (default 2)")
        cmd.add_argument("--key", help="this client's CURVE key file (NAME.key_secret)")
        cmd.add_argument("--server-key", help="the daemon's public key file")
        if name == "set":
            cmd.add_argument(
                "pairs",
                nargs="+",
                metavar="ID=VALUE",
                help="actuator id (phase rad / coupling 0..1), GATE.kappa= or GATE.phase=",
            )
            cmd.add_argument("--volts", action="store_true", help="values are volts")
        if name == "monitors":
            cmd.add_argument("--average", type=int, default=1, help="reads to average (default 1)")
        if name == "estop":
            cmd.add_argument("--reason", default="command line", help="recorded in the journal")
        if name == "recover":
            cmd.add_argument("board", help="the board id")
        cmd.set_defaults(run=_cmd_client)
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
    try:
        code: int = args.run(args)
        return code
    except UnreachableError as exc:
        print(f"meshwarden: unreachable: {exc.message}", file=sys.stderr)
        return EXIT_UNREACHABLE
    except MeshwardenError as exc:
        print(f"meshwarden: {exc.code}: {exc.message}", file=sys.stderr)
        return EXIT_REFUSED if args.command in CLIENT_COMMANDS else EXIT_USAGE
    except KeyboardInterrupt:
        return 130
    except Exception as exc:  # the last line of defence: no traceback for the user
        if args.debug:
            raise
        print(
            f"meshwarden: internal error: {type(exc).__name__}: {exc} (run with --debug for details)", file=sys.stderr
        )
        return EXIT_USAGE


if __name__ == "__main__":
    raise SystemExit(main())
