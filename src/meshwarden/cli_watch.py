"""`meshwarden watch TOPIC...`: live telemetry, one readable line (or one JSON line) per message."""

from __future__ import annotations

import argparse
import json
import sys
import time
from typing import Any

from meshwarden.cli_common import UsageError, open_client

TOPICS = ("heartbeat", "monitors", "state", "event", "job")


def line(topic: str, message: dict[str, Any]) -> str:
    """A readable one-line summary of a telemetry message."""
    when = time.strftime("%H:%M:%S", time.localtime(message.get("ts", time.time())))
    body = {k: v for k, v in message.items() if k not in ("seq", "ts", "topic")}
    if topic == "monitors":
        readings = body.get("monitors", {})
        text = "  ".join(f"{m}={r['watts']:.3e} W" for m, r in list(readings.items())[:8])
        more = f"  (+{len(readings) - 8})" if len(readings) > 8 else ""
        return f"{when} monitors  {text}{more}"
    if topic == "job" and "progress" in body:
        return f"{when} job       {body['job']} {body['kind']} {body['progress']:.0%} ({body['step']}/{body['steps']})"
    if topic == "gap":
        return f"{when} gap       {body['missed']} messages missed"
    parts = " ".join(f"{k}={json.dumps(v, default=str)}" for k, v in sorted(body.items()))
    return f"{when} {topic:<9} {parts}"


def cmd_watch(args: argparse.Namespace) -> int:
    unknown = [t for t in args.topics if t not in TOPICS]
    if unknown:
        raise UsageError(f"watch: unknown topic '{unknown[0]}' (topics: {', '.join(TOPICS)})")
    shown = 0
    with open_client(args) as client:
        client.status()  # a daemon that is not there is said within --timeout, not by silence
        stream = client.subscribe(args.topics or None, timeout_s=None, deadline_s=args.duration)
        try:
            for topic, message in stream:
                print(json.dumps({"topic": topic, **message}) if args.json else line(topic, message), flush=True)
                shown += 1
                if args.count and shown >= args.count:
                    break
        except KeyboardInterrupt:
            pass
        except BrokenPipeError:
            sys.stderr.close()  # `watch | head`: the reader left; not an error
    return 0
