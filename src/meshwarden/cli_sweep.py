"""`meshwarden sweep ID=START:STOP:POINTS ... --out FILE.csv`: a grid of settings, every point
through the guard, the monitors read at each; progress and ETA on a terminal; Ctrl-C ends the
sweep after the current point and keeps the rows measured."""

from __future__ import annotations

import argparse
import signal
import sys
from types import FrameType
from typing import Any

from meshwarden.cli_common import UsageError, open_client
from meshwarden.cli_progress import Progress
from meshwarden.errors import MeshwardenError
from meshwarden.sweep import grid, parse_axis, run_sweep, write_csv


def cmd_sweep(args: argparse.Namespace) -> int:
    try:
        axes = [parse_axis(spec) for spec in args.axes]
        total = len(grid(axes))
    except MeshwardenError as exc:
        raise UsageError(exc.message) from None
    monitors = [m for m in (args.monitors or "").split(",") if m]
    rows: list[dict[str, Any]] = []
    stop = {"asked": False}

    def on_interrupt(_sig: int, _frame: FrameType | None) -> None:
        if stop["asked"]:
            raise KeyboardInterrupt
        stop["asked"] = True
        print("\nmeshwarden: stopping the sweep after this point (Ctrl-C again to leave now)", file=sys.stderr)

    previous = signal.signal(signal.SIGINT, on_interrupt)
    progress = Progress(f"sweep of {total} points")
    failure: MeshwardenError | None = None
    try:
        with open_client(args) as client:
            run_sweep(
                client,
                axes,
                monitors,
                average=args.average,
                integration_s=args.integration,
                volts=args.volts,
                progress=progress.update,
                should_stop=lambda: stop["asked"],
                rows=rows,
            )
    except MeshwardenError as exc:
        failure = exc
    finally:
        signal.signal(signal.SIGINT, previous)
        progress.close()
        write_csv(args.out, rows)
    print(f"{len(rows)} of {total} points written to {args.out}")
    if failure is not None:
        raise failure
    return 130 if stop["asked"] else 0
