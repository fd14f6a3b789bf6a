"""`meshwarden calibrate` and `meshwarden calibration list|show|activate`.

Calibration runs as a job in the daemon; the command starts it, follows its progress (the
current actuator and an ETA on a terminal) and prints the report. Ctrl-C asks the daemon to
stop it cooperatively: outputs stay where the last verified step left them, and no version is
written.

``--plot DIR`` (``calibrate`` and ``calibration show``) draws the version's figures into DIR
(:mod:`meshwarden.calibration_plot`) when matplotlib is installed; without it, one line says so
and the command does everything else as usual. What the plot adds goes to stderr, so ``--json``
output stays one JSON document.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

from meshwarden.cli_common import UsageError, open_client
from meshwarden.cli_progress import Progress
from meshwarden.errors import MeshwardenError
from meshwarden.lattice_plot import NO_MATPLOTLIB, load_pyplot

EXIT_OK, EXIT_REFUSED, EXIT_INTERRUPTED = 0, 1, 130
POLL_S = 0.3


def add_parsers(sub: Any, client_command: Callable[..., argparse.ArgumentParser]) -> None:
    """Register the commands on the top parser's subparsers (``client_command`` adds the
    endpoint, timeout and key options every client command has)."""
    cal = client_command("calibrate", "measure actuators in place and store a new calibration version", cmd_calibrate)
    cal.add_argument("targets", nargs="*", metavar="ID", help="actuators or gates (default: the whole chip)")
    cal.add_argument("--points", type=int, help="points per sweep (12..64; default 12)")
    cal.add_argument("--no-activate", action="store_true", help="store the version but keep the tables in force")
    cal.add_argument("--plot", metavar="DIR", help="draw sweeps and a residual map into DIR (matplotlib)")
    versions = client_command("calibration", "calibration versions: list, show VERSION, activate VERSION", cmd_versions)
    versions.add_argument("action", choices=("list", "show", "activate"))
    versions.add_argument("version", nargs="?", help="a version name (or 'config': the configuration's own tables)")
    versions.add_argument("--plot", metavar="DIR", help="with show: draw the version's figures into DIR (matplotlib)")


def cmd_calibrate(args: argparse.Namespace) -> int:
    plt = _pyplot_for(args.plot)
    with open_client(args) as client:
        started = client.calibrate(args.targets or None, args.points, not args.no_activate, wait=False)
        job_id = started["job"]
        progress = Progress("calibrating")
        try:
            job = _follow(client, job_id, progress)
        except KeyboardInterrupt:
            progress.close()
            client.cancel(job_id)
            print(f"meshwarden: asked {job_id} to stop; outputs stay where its last step left them")
            return EXIT_INTERRUPTED
        progress.close()
        if job["state"] != "done":
            error = job.get("error") or {}
            print(f"meshwarden: calibration {job['state']}: {error.get('code', '')}: {error.get('message', '')}")
            return EXIT_REFUSED
        report: dict[str, Any] = job["result"]
        shown = client.calibration(report["version"], sweeps=True) if plt is not None else None
    print(json.dumps(report, indent=2) if args.json else _report_text(report))
    if shown is not None:  # after the report: a plot that cannot be written loses nothing else
        _plot(plt, Path(args.plot), shown)
    return EXIT_OK


def _follow(client: Any, job_id: str, progress: Progress) -> dict[str, Any]:
    while True:
        job: dict[str, Any] = client.job(job_id)
        step = job.get("progress") or {}
        if step.get("steps"):
            progress.label = f"calibrating {step.get('what') or ''}".rstrip()
            progress.update(int(step["step"]), int(step["steps"]))
        if job["state"] != "running":
            return job
        time.sleep(POLL_S)


def _report_text(report: dict[str, Any]) -> str:
    counts: dict[str, int] = {}
    for outcome in report["actuators"].values():
        counts[outcome["status"]] = counts.get(outcome["status"], 0) + 1
    lines = [
        f"version {report['version']} ({'activated' if report['activated'] else 'stored, not activated'}): "
        + ", ".join(f"{n} {s}" for s, n in sorted(counts.items()))
        + f"; {report['frames']} monitor frames in {report.get('seconds', 0):.1f} s"
    ]
    for actuator, outcome in sorted(report["actuators"].items()):
        if outcome["status"] != "ok":
            lines.append(f"  {actuator:>8}  {outcome['status']:<12} {outcome['reason']}")
    return "\n".join(lines)


def _pyplot_for(plot_dir: str | None) -> Any | None:
    """pyplot when a plot was asked for and matplotlib is there; otherwise None (and the one line
    saying why, when it was asked for)."""
    if not plot_dir:
        return None
    plt = load_pyplot()
    if plt is None:
        print(NO_MATPLOTLIB, file=sys.stderr)
    return plt


def _plot(plt: Any, directory: Path, shown: dict[str, Any]) -> None:
    from meshwarden.calibration_plot import write_plots

    written, notes = write_plots(plt, directory, shown)
    for note in notes:
        print(f"meshwarden: {note}", file=sys.stderr)
    print(f"meshwarden: {len(written)} figure{'' if len(written) == 1 else 's'} in {directory}", file=sys.stderr)


def cmd_versions(args: argparse.Namespace) -> int:
    if args.action != "list" and not args.version:
        raise MeshwardenError(f"calibration {args.action} needs a VERSION (see `meshwarden calibration list`)")
    if args.plot and args.action != "show":
        raise UsageError(f"--plot goes with `calibration show VERSION`, not with {args.action}")
    plt = _pyplot_for(args.plot)
    with open_client(args) as client:
        if args.action == "list":
            rows = client.calibrations()
            if args.json:
                print(json.dumps(rows, indent=2))
                return EXIT_OK
            for row in rows:
                counts = ", ".join(f"{n} {s}" for s, n in sorted((row.get("counts") or {}).items()))
                if row.get("error"):
                    counts = f"cannot be read: {row['error']}"
                mark = "*" if row["active"] else " "
                created = row.get("created") or ("(configuration)" if row["version"] == "config" else "?")
                print(f"{mark} {row['version']:<32} {created:<22} {counts}")
            return EXIT_OK
        if args.action == "show":
            shown = client.calibration(args.version, sweeps=plt is not None)
            plain = {k: shown[k] for k in ("version", "active", "manifest")}  # the reply as without --plot
            print(json.dumps(plain, indent=2) if args.json else _manifest_text(plain))
            if plt is not None:
                _plot(plt, Path(args.plot), shown)
            return EXIT_OK
        result = client.activate_calibration(args.version)
        if args.json:
            print(json.dumps(result, indent=2))
        else:
            changed = result.get("changed") or {}
            print(f"active: {result['version']}; no output moved")
            for actuator, change in sorted(changed.items()):
                print(f"  {actuator}: {change['volts']:.3f} V now means {change['now']} (was {change['before']})")
        return EXIT_OK


def _manifest_text(shown: dict[str, Any]) -> str:
    manifest = shown.get("manifest")
    if not manifest:
        return f"{shown['version']}: the configuration's own tables{' (active)' if shown['active'] else ''}"
    lines = [
        f"{shown['version']}{' (active)' if shown['active'] else ''}: created {manifest.get('created')}, "
        f"{manifest.get('frames')} frames, configuration {manifest.get('configuration_hash')}",
        f"  method: {manifest.get('method')}",
    ]
    for actuator, outcome in sorted((manifest.get("actuators") or {}).items()):
        residual = outcome.get("residual")
        text = "" if residual is None else f"residual {residual:.3g}"
        lines.append(f"  {actuator:>8}  {outcome['status']:<12} {text} {outcome.get('reason', '')}".rstrip())
    crosstalk = manifest.get("crosstalk") or {}
    if crosstalk:
        lines.append("  crosstalk (share of a neighbour's V^2 acting on an actuator; cancelled in requests):")
        for on, row in sorted(crosstalk.items()):
            shares = ", ".join(f"{by} {share:.4f}" for by, share in sorted(row.items()))
            lines.append(f"  {on:>8}  <- {shares}")
    return "\n".join(lines)
