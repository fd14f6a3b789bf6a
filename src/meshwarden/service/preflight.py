"""Checks made before the daemon opens anything: before a board link, before a socket.

* Listening beyond loopback needs CURVE (``config.checks.is_loopback`` decides what is local,
  and fails closed), whatever ``--bind``/``--pub`` say.
* A secret key file that the group or others may read is refused, as ssh refuses a private key
  that others can read: a copied key is a stolen identity, and with it a role on the rack.
"""

from __future__ import annotations

from pathlib import Path

import zmq.auth

from meshwarden.config.checks import is_loopback
from meshwarden.config.model import Config
from meshwarden.errors import ConfigError, ConfigIssue
from meshwarden.service.keyfiles import check_secret_key_file


def check_exposure(config: Config, bind: str, pub: str) -> None:
    """Refuse endpoints beyond loopback unless the configuration sets up CURVE."""
    exposed = [e for e in (bind, pub) if not is_loopback(e)]
    if exposed and config.service.server_secret_key_file is None:
        raise ConfigError(
            [
                ConfigIssue(
                    str(config.source or "<config>"),
                    0,
                    "service",
                    f"{exposed[0]} is beyond loopback (only tcp on 127.0.0.0/8, ::1 or localhost, and ipc:// "
                    "paths are local): configure server_secret_key_file and service.clients (CURVE) first",
                )
            ]
        )


def load_server_key(path: Path) -> tuple[bytes, bytes]:
    """The daemon's (public, secret) CURVE key pair, from a private file."""
    check_secret_key_file(path)
    try:
        public, secret = zmq.auth.load_certificate(str(path))
    except (OSError, ValueError) as exc:
        raise ConfigError(
            [ConfigIssue(str(path), 0, "service.server_secret_key_file", f"cannot read the key: {exc}")]
        ) from None
    if secret is None:
        issue = ConfigIssue(str(path), 0, "service.server_secret_key_file", "this file holds no secret key")
        raise ConfigError([issue])
    return public, secret


def preflight(config: Config, bind: str, pub: str) -> None:
    """Every check that must pass before a board link or a socket is opened."""
    check_exposure(config, bind, pub)
    if config.service.server_secret_key_file is not None:
        load_server_key(config.service.server_secret_key_file)
