"""Commands that move outputs: set, load, disarm, restore - followed to their end, and stoppable.

`set` (and `load`, which is a `set` from a file) starts the ramp as a job and follows it: a
progress bar from the `job` telemetry topic on a terminal, and a `jobs` poll within
``--timeout`` so a daemon that goes silent mid-ramp is reported, not waited on for minutes.
Ctrl-C asks the daemon to stop the job cooperatively (the write in flight completes), waits for
it to end and prints where the outputs ended; a second Ctrl-C leaves at once.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path
from typing import Any

import zmq

from meshwarden.cli_common import UsageError, open_client
from meshwarden.cli_progress import Progress
from meshwarden.cli_tables import actuator_rows
from meshwarden.cli_values import parse_pairs, resolve_names, values_from_document
from meshwarden.client import Client
from meshwarden.errors import MeshwardenError

EXIT_OK, EXIT_REFUSED, EXIT_INTERRUPTED = 0, 1, 130
POLL_S = 0.5


def _follow(client: Client, job_id: str, sub: zmq.Socket[bytes], progress: Progress) -> dict[str, Any]:
    """Wait for the job's end (its description from `jobs`), drawing progress; raises KeyboardInterrupt."""
    next_poll = 0.0
    while True:
        if sub.poll(100):
            while sub.poll(0):
                _topic, body = sub.recv_multipart()
                message = json.loads(body)
                if message.get("job") == job_id and "steps" in message:
                    progress.update(int(message["step"]), int(message["steps"]))
        if time.monotonic() >= next_poll:
            next_poll = time.monotonic() + POLL_S
            job = next((j for j in client.jobs() if j["id"] == job_id), None)
            if job is None:
                raise MeshwardenError(f"{job_id} is no longer known to the daemon (was it restarted?)")
            if job["state"] != "running":
                return job


def run_values(args: argparse.Namespace, values: dict[str, float], volts: bool, angled: set[str]) -> int:
    """Check the names, start the set as a job, follow it, print where the outputs are."""
    as_json = args.json
    with open_client(args) as client:
        view = client.get()
        names = resolve_names(values, view, angled)
        sub = client.telemetry_socket(["job"])
        job_id: str | None = None
        progress = Progress(f"ramping {len(values)} output(s)")
        interrupted = False
        try:
            try:
                job_id = str(client.set(values, volts=volts, wait=False)["job"])
                progress.label = f"{job_id} {progress.label}"
                job = _follow(client, job_id, sub, progress)
            except KeyboardInterrupt:
                if job_id is None:
                    raise  # nothing started (or its id never came back): nothing to stop
                progress.close()
                interrupted = True
                print(f"meshwarden: stopping {job_id} (the write in flight completes) ...", file=sys.stderr)
                client.cancel(job_id)
                progress = Progress(f"{job_id} stopping")
                job = _follow(client, job_id, sub, progress)
            progress.close()
        finally:
            sub.close(0)
        after = client.get()
    ended = {aid: after["actuators"][aid] for aid in dict.fromkeys(names.values())}
    if as_json:
        print(json.dumps({"job": job, "actuators": ended}, indent=2, sort_keys=True))
    else:
        if job["state"] == "done":
            print(f"{job_id}: done")
        else:
            error = job.get("error") or {}
            print(f"{job_id}: {job['state']}: {error.get('message', '')}".rstrip(": "))
            print("outputs ended at:")
        print(actuator_rows(ended))
    if job["state"] == "done":
        return EXIT_OK
    return EXIT_INTERRUPTED if interrupted else EXIT_REFUSED


def cmd_set(args: argparse.Namespace) -> int:
    if args.source:
        if args.pairs:
            raise UsageError("set: give ID=VALUE pairs or --from FILE, not both")
        values, volts = values_from_document(_read_json(Path(args.source)), args.volts)
        return run_values(args, values, volts, set())
    if not args.pairs:
        raise UsageError("set: give ID=VALUE pairs (e.g. g05.kappa=0.5, p05=90 deg, c03=12 V) or --from FILE")
    values, volts, angled = parse_pairs(args.pairs, args.volts)
    return run_values(args, values, volts, angled)


def _read_json(path: Path) -> Any:
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise UsageError(f"cannot read {path}: {exc.strerror}") from None
    except ValueError as exc:
        raise UsageError(f"{path} is not JSON: {exc}") from None


def cmd_ramp_op(args: argparse.Namespace) -> int:
    """disarm or restore: one request whose reply comes when the ramp has ended."""
    from meshwarden.cli_tables import render

    with open_client(args) as client:
        client.status()  # unreachable is said within --timeout, before a long wait starts
        if not args.json:
            what = (
                "every output to zero" if args.command == "disarm" else "reset boards back to their journaled targets"
            )
            print(f"meshwarden: ramping {what} (up to {args.ramp_timeout:g} s) ...", file=sys.stderr, flush=True)
        client.retries = 0  # one wait of at most --ramp-timeout, not one per try
        result = client.request(args.command)
    print(json.dumps(result, indent=2, sort_keys=True) if args.json else render(args.command, result))
    return EXIT_OK
