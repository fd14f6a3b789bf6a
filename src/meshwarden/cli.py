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
from meshwarden.errors import ConfigError, MeshwardenError
from meshwarden.logsetup import configure_logging

EXIT_OK, EXIT_REFUSED, EXIT_USAGE, EXIT_UNREACHABLE = 0, 1, 2, 3


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
    except MeshwardenError as exc:
        print(f"meshwarden: {exc.code}: {exc.message}", file=sys.stderr)
        return EXIT_USAGE
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
