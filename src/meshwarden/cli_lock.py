"""`meshwarden lock start|list|stop`: closed-loop locks on a running daemon.

    meshwarden lock start arm3 --actuator p03 --monitor m04 --hold max
    meshwarden lock start split --actuator p05 --monitor m06 --hold fraction=0.3 --against m07
    meshwarden lock list [--json]
    meshwarden lock stop arm3 | --all

Exit codes as for every client command: 0 ok, 1 refused by the daemon, 2 usage, 3 unreachable.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from typing import Any

from meshwarden.cli_common import UsageError, add_client_options, open_client
from meshwarden.errors import MeshwardenError, UnreachableError

EXIT_OK, EXIT_REFUSED, EXIT_USAGE = 0, 1, 2
LIST_KEYS = ("state", "actuator", "monitor", "hold", "residual", "value")


def add_parsers(sub: Any) -> None:
    """Add ``lock`` and its subcommands to the ``meshwarden`` parser's subparsers."""
    lock = sub.add_parser("lock", help="closed-loop locks: start, list, stop")
    actions = lock.add_subparsers(dest="lock_action", metavar="ACTION", parser_class=type(lock))
    start = actions.add_parser("start", help="hold max/min power at a monitor, or a power fraction of two")
    start.add_argument("name", help="the lock's name (letters, digits, _.:-)")
    start.add_argument("--actuator", required=True, help="the actuator the lock moves")
    start.add_argument("--monitor", required=True, help="the monitor it watches")
    start.add_argument("--hold", required=True, help="max, min or fraction=X (X = P_monitor / (P_monitor + P_against))")
    start.add_argument("--against", help="the second monitor of a fraction")
    start.add_argument("--dither", type=float, help="dither amplitude in value units (rad; power coupling)")
    start.add_argument("--bandwidth", type=float, help="loop bandwidth in Hz (default: loop gain 0.5 per window)")
    listing = actions.add_parser("list", help="every lock with its state, residual and value")
    stop = actions.add_parser("stop", help="stop one lock, or all of them")
    stop.add_argument("name", nargs="?", help="the lock to stop")
    stop.add_argument("--all", action="store_true", help="stop every running lock")
    for cmd in (start, listing, stop):
        add_client_options(cmd)
    lock.set_defaults(run=run)


def _number(value: Any) -> str:
    return f"{value:.4g}" if isinstance(value, float) and math.isfinite(value) else str(value)


def render_locks(table: dict[str, dict[str, Any]]) -> str:
    """The lock list as a text table."""
    if not table:
        return "no locks"
    header = ("NAME", "STATE", "ACTUATOR", "MONITOR", "HOLD", "RESIDUAL", "VALUE")
    rows = [header] + [
        (
            name,
            str(d["state"]),
            str(d["actuator"]),
            str(d["monitor"]),
            str(d["hold"]),
            _number(d["residual"]),
            _number(d["value"]),
        )
        for name, d in sorted(table.items())
    ]
    widths = [max(len(row[i]) for row in rows) for i in range(len(header))]
    return "\n".join("  ".join(cell.ljust(w) for cell, w in zip(row, widths, strict=True)).rstrip() for row in rows)


def run(args: argparse.Namespace) -> int:
    """Run ``meshwarden lock ACTION``."""
    action = getattr(args, "lock_action", None)
    if action is None:
        print("meshwarden: lock: give an action: start, list or stop", file=sys.stderr)
        return EXIT_USAGE
    if action == "stop" and (args.all == (args.name is not None)):
        print("meshwarden: lock stop: give a NAME or --all (not both)", file=sys.stderr)
        return EXIT_USAGE
    try:
        with open_client(args) as client:
            if action == "start":
                result: Any = client.lock_start(
                    args.name,
                    args.actuator,
                    args.monitor,
                    args.hold,
                    against=args.against,
                    dither=args.dither,
                    bandwidth_hz=args.bandwidth,
                )
                text = render_locks(result)
            elif action == "list":
                result = {name: {k: d[k] for k in LIST_KEYS} for name, d in client.locks().items()}
                text = render_locks(result)
            else:
                result = {"stopped": client.lock_stop(None if args.all else args.name)}
                text = "stopped: " + (", ".join(result["stopped"]) or "none")
    except (UnreachableError, UsageError):
        raise  # the command line's own exit codes
    except MeshwardenError as exc:
        print(f"meshwarden: {exc.code}: {exc.message}", file=sys.stderr)
        return EXIT_REFUSED
    print(json.dumps(result, indent=2, sort_keys=True, default=str) if args.json else text)
    return EXIT_OK
