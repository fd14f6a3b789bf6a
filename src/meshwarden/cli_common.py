"""What every client command of the command line shares: finding the daemon and the client's timing.

The daemon is found, first match wins, from ``--endpoint``; the ``MESHWARDEN_ENDPOINT``
environment variable (``MESHWARDEN_TELEMETRY`` for the telemetry endpoint); the ``service``
section of ``--config``; the user file ``$XDG_CONFIG_HOME/meshwarden/client.yaml`` (``endpoint:``,
``telemetry:``); else ``tcp://127.0.0.1:7640``.

``--timeout`` is one number with one meaning for every command: how long to wait for the daemon
to answer at all. The tries (``--retries``) share it, so a daemon that is not there is reported
within ``--timeout`` seconds. A ramp (set, disarm, restore, load) may take longer than that once
the daemon has answered; ``--ramp-timeout`` bounds the wait for a ramp that cannot be followed
step by step (disarm, restore).
"""

from __future__ import annotations

import argparse
import math
import os
from pathlib import Path
from typing import Any

from meshwarden.client import Client
from meshwarden.config.model import Config
from meshwarden.errors import MeshwardenError

DEFAULT_ENDPOINT = "tcp://127.0.0.1:7640"


class UsageError(MeshwardenError):
    """A command line that cannot be carried out as written (exit code 2); nothing was sent."""

    code = "usage"


def user_config_file() -> Path:
    base = os.environ.get("XDG_CONFIG_HOME") or str(Path.home() / ".config")
    return Path(base) / "meshwarden" / "client.yaml"


def add_client_options(cmd: argparse.ArgumentParser) -> None:
    cmd.add_argument(
        "--endpoint", help=f"the daemon's command endpoint (default: see `meshwarden --help`, {DEFAULT_ENDPOINT})"
    )
    cmd.add_argument("--telemetry", help="the daemon's telemetry endpoint (default: the command port + 1)")
    cmd.add_argument("--config", help="take the endpoints (and the boards' watchdog plan) from this configuration")
    cmd.add_argument("--json", action="store_true", help="machine-readable output")
    cmd.add_argument(
        "--timeout",
        type=float,
        default=3.0,
        help="seconds to wait for the daemon to answer, all tries together (default 3)",
    )
    cmd.add_argument("--retries", type=int, default=2, help="tries after the first, within --timeout (default 2)")
    cmd.add_argument(
        "--ramp-timeout",
        type=float,
        default=120.0,
        help="seconds to wait for a disarm or restore ramp to finish once the daemon answered (default 120)",
    )
    cmd.add_argument(
        "--client-id", default=os.environ.get("MESHWARDEN_CLIENT_ID"), help="this client's id (leases belong to it)"
    )
    cmd.add_argument("--key", help="this client's CURVE key file (NAME.key_secret)")
    cmd.add_argument("--server-key", help="the daemon's public key file")


def loaded_config(args: argparse.Namespace) -> Config | None:
    """The ``--config`` file, loaded once per command (None without one)."""
    if not getattr(args, "config", None):
        return None
    cached: Config | None = getattr(args, "_loaded_config", None)
    if cached is None:
        from meshwarden.config import load_config

        cached = load_config(Path(args.config))
        args._loaded_config = cached
    return cached


def endpoints(args: argparse.Namespace) -> tuple[str, str | None]:
    """(command endpoint, telemetry endpoint or None for the +1 convention), by the order above."""
    if args.endpoint:
        return args.endpoint, args.telemetry
    env = os.environ.get("MESHWARDEN_ENDPOINT")
    if env:
        return env, args.telemetry or os.environ.get("MESHWARDEN_TELEMETRY")
    config = loaded_config(args)
    if config is not None:
        return config.service.bind, args.telemetry or config.service.pub
    path = user_config_file()
    if path.exists():
        import yaml

        try:
            raw: Any = yaml.safe_load(path.read_text(encoding="utf-8"))
        except (OSError, yaml.YAMLError) as exc:
            raise UsageError(f"cannot read {path}: {exc}") from None
        if not isinstance(raw, dict) or not isinstance(raw.get("endpoint"), str):
            raise UsageError(f"{path} must hold 'endpoint: tcp://HOST:PORT' (and optionally 'telemetry:')")
        telemetry = raw.get("telemetry")
        return raw["endpoint"], args.telemetry or (telemetry if isinstance(telemetry, str) else None)
    return DEFAULT_ENDPOINT, args.telemetry


def open_client(args: argparse.Namespace) -> Client:
    """A client whose tries together take at most ``--timeout`` seconds."""
    if not (math.isfinite(args.timeout) and args.timeout > 0) or args.retries < 0:
        raise UsageError("--timeout must be a positive number of seconds and --retries 0 or more")
    if not (math.isfinite(args.ramp_timeout) and args.ramp_timeout > 0):
        raise UsageError("--ramp-timeout must be a positive number of seconds")
    endpoint, telemetry = endpoints(args)
    return Client(
        endpoint,
        telemetry,
        timeout_s=args.timeout / (args.retries + 1),
        retries=args.retries,
        ramp_timeout_s=args.ramp_timeout,
        client_id=args.client_id,
        key_file=args.key,
        server_key_file=args.server_key,
    )
