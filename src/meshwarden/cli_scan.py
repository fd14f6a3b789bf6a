"""`meshwarden scan` and `meshwarden scans`: fault scans from the command line.

    meshwarden scan [ID ...] [--json] [--report FILE] [--plot FILE] [--endpoint URL]
    meshwarden scans [--json]

``scan`` runs a scan in the daemon and waits for it, showing its progress on a terminal; it
prints the findings (``--json``: ``{"frames", "actuators", "monitors", "changed"}``), writes the
whole report to ``--report FILE`` (JSON if FILE ends in .json, else text), and draws the lattice
coloured by verdict to ``--plot FILE`` when matplotlib is installed (the ``plot`` extra). Exit
codes as for every client command: 0 ok, 1 refused, 2 usage, 3 unreachable.
"""

from __future__ import annotations

import argparse
import json
import sys
import threading
from pathlib import Path
from typing import Any

from meshwarden.cli_common import UsageError, add_client_options, open_client
from meshwarden.errors import MeshwardenError, UnreachableError
from meshwarden.lattice_plot import NO_MATPLOTLIB, draw_lattice, load_pyplot, save_figure

EXIT_OK, EXIT_REFUSED, EXIT_USAGE, EXIT_UNREACHABLE = 0, 1, 2, 3
PINNED_KEYS = ("frames", "actuators", "monitors", "changed")
QUIET = ("ok",)
COLOURS = {
    "ok": "#4caf50",
    "no_response": "#d32f2f",
    "driver_fault": "#7b1fa2",
    "drifted": "#f57c00",
    "unobservable": "#9e9e9e",
    "untested": "#ffffff",
    "dead": "#d32f2f",
    "saturated": "#7b1fa2",
    "noisy": "#f57c00",
    "frozen": "#1976d2",
}


def add_parsers(sub: Any) -> None:
    """Add ``scan`` and ``scans`` to the command line's subparsers."""
    scan = sub.add_parser("scan", help="run a fault scan: stuck actuators, driver and monitor faults")
    scan.add_argument("targets", nargs="*", metavar="ID", help="actuators or gates (default: all)")
    scan.add_argument("--report", metavar="FILE", help="write the whole report (JSON if FILE ends in .json)")
    scan.add_argument("--plot", metavar="FILE", help="draw the lattice coloured by verdict (needs matplotlib)")
    add_client_options(scan)
    scan.set_defaults(run=run)
    scans = sub.add_parser("scans", help="past fault scans with their counts of findings")
    scans.add_argument("--limit", type=int, default=100, help="how many, newest first (default 100)")
    add_client_options(scans)
    scans.set_defaults(run=run)


def run(args: argparse.Namespace) -> int:
    """Run ``scan`` or ``scans``; refusals and an unreachable daemon become exit codes, not tracebacks."""
    try:
        return _scan(args) if args.command == "scan" else _scans(args)
    except UnreachableError as exc:
        print(f"meshwarden: unreachable: {exc.message}", file=sys.stderr)
        return EXIT_UNREACHABLE
    except UsageError:
        raise  # the command line's own exit code (2)
    except MeshwardenError as exc:
        print(f"meshwarden: {exc.code}: {exc.message}", file=sys.stderr)
        return EXIT_REFUSED


def _scans(args: argparse.Namespace) -> int:
    if not 1 <= args.limit <= 1000:
        print("meshwarden: scans: --limit must be 1 to 1000", file=sys.stderr)
        return EXIT_USAGE
    with open_client(args) as client:
        history = client.scans(limit=args.limit)
    if args.json:
        print(json.dumps(history, indent=2, sort_keys=True))
        return EXIT_OK
    if not history:
        print("no scans yet")
        return EXIT_OK
    print(f"{'scan':<40}{'trigger':<10}{'frames':>7}{'findings':>9}{'changed':>8}  actuators / monitors")
    for item in history:
        counts = "  ".join(
            ", ".join(f"{v} {n}" for v, n in sorted(item["counts"][kind].items())) for kind in ("actuators", "monitors")
        )
        print(
            f"{item['id']:<40}{item['trigger']:<10}{item['frames']:>7}{item['findings']:>9}{item['changed']:>8}  "
            f"{counts}"
        )
    return EXIT_OK


def _scan(args: argparse.Namespace) -> int:
    report = _run_with_progress(args) if sys.stderr.isatty() and not args.json else _run_plain(args)
    if args.report:
        _write_report(Path(args.report), report)
    if args.plot:
        _plot(Path(args.plot), report)
    if args.json:
        print(json.dumps({key: report[key] for key in PINNED_KEYS}, indent=2, sort_keys=True))
    else:
        print(render(report))
    return EXIT_OK


def _run_plain(args: argparse.Namespace) -> dict[str, Any]:
    with open_client(args) as client:
        result = client.scan(args.targets or None, wait=True)
    report: dict[str, Any] = result["scan"]
    return report


def _run_with_progress(args: argparse.Namespace) -> dict[str, Any]:
    """Wait for the scan in a helper thread while this one shows the job's progress from telemetry."""
    outcome: dict[str, Any] = {}
    with open_client(args) as watcher:
        stream = watcher.subscribe(["job"], timeout_s=0.2)

        def work() -> None:
            try:
                outcome["report"] = _run_plain(args)
            except MeshwardenError as exc:
                outcome["error"] = exc

        thread = threading.Thread(target=work, name="scan-request", daemon=True)
        thread.start()
        while thread.is_alive():
            for _topic, message in stream:
                if message.get("kind") == "scan" and "progress" in message:
                    print(f"\rscan {message['job']}: {100 * message['progress']:5.1f} %", end="", file=sys.stderr)
                if not thread.is_alive():
                    break
            stream = watcher.subscribe(["job"], timeout_s=0.2, settle_s=0.0) if thread.is_alive() else stream
        thread.join()
        print(file=sys.stderr)
    if "error" in outcome:
        raise outcome["error"]
    report: dict[str, Any] = outcome["report"]
    return report


def render(report: dict[str, Any]) -> str:
    """The report for a person: counts, findings with their reasons, what changed."""
    lines = [f"scan {report.get('id', '')}: {report['frames']} monitor frames"]
    for kind in ("actuators", "monitors"):
        counts: dict[str, int] = {}
        for verdict in report[kind].values():
            counts[verdict["verdict"]] = counts.get(verdict["verdict"], 0) + 1
        lines.append(f"{kind}: " + ", ".join(f"{n} {v}" for v, n in sorted(counts.items())))
    findings = [
        (part, verdict)
        for kind in ("actuators", "monitors")
        for part, verdict in report[kind].items()
        if verdict["verdict"] not in QUIET
    ]
    if findings:
        lines.append("")
        lines.append(f"{'part':<12}{'verdict':<14}why")
        for part, verdict in findings:
            lines.append(f"{part:<12}{verdict['verdict']:<14}{verdict.get('reason', '')}")
    if report["changed"]:
        lines.append("")
        lines.append("changed since the previous scan:")
        for change in report["changed"]:
            lines.append(f"  {change['part']}: {change['was'] or 'new'} -> {change['now']}")
    if report.get("outputs_restored") is False:
        lines.append("WARNING: some outputs did not return to their starting codes; check `meshwarden get`")
    return "\n".join(lines)


def _write_report(path: Path, report: dict[str, Any]) -> None:
    text = json.dumps(report, indent=2, sort_keys=True) if path.suffix == ".json" else render(report) + "\n"
    try:
        path.write_text(text, encoding="utf-8")
    except OSError as exc:
        raise MeshwardenError(f"cannot write the report to {path}: {exc}") from None


def _plot(path: Path, report: dict[str, Any]) -> None:
    plt = load_pyplot()
    if plt is None:
        print(NO_MATPLOTLIB, file=sys.stderr)
        return
    save_figure(plt, draw(plt, report), path)


def draw(plt: Any, report: dict[str, Any]) -> Any:
    """The lattice as gates (coupler left half, phase right half) and monitors (dots), coloured by verdict."""
    actuators, monitors = report["actuators"], report["monitors"]

    def style(part: str) -> dict[str, Any]:
        verdict = (actuators.get(part) or monitors.get(part) or {}).get("verdict", "untested")
        return {"color": COLOURS.get(verdict, "#000000")}

    def monitor_colour(monitor: str) -> str:
        return COLOURS.get(monitors.get(monitor, {}).get("verdict", "ok"), "#000000")

    figure, axes = plt.subplots(figsize=(10, 6))
    draw_lattice(
        plt,
        axes,
        report.get("layout"),
        report.get("gates") or {},
        style,
        monitor_colour,
        unplaced=[*actuators, *monitors],
    )
    handles = [plt.Rectangle((0, 0), 1, 1, color=c) for c in COLOURS.values()]
    axes.legend(handles, list(COLOURS), loc="upper left", bbox_to_anchor=(1.0, 1.0), fontsize=7)
    axes.set_title(f"fault scan {report.get('id', '')}")
    figure.tight_layout()
    return figure
