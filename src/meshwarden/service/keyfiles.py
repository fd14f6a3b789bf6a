"""CURVE key files: made private, and refused when they are not (as ssh refuses a private key
that others can read: a copied secret key is a stolen identity, and with it a role on the rack).

Kept free of the daemon's imports so that the client library can use it too.
"""

from __future__ import annotations

import os
import stat
from pathlib import Path

import zmq.auth

from meshwarden.errors import MeshwardenError


def check_secret_key_file(path: Path) -> None:
    """Refuse a secret key file that is missing, not a regular file, or readable by group/other."""
    try:
        info = path.stat()
    except OSError as exc:
        raise MeshwardenError(f"cannot read the secret key file {path}: {exc.strerror}", path=str(path)) from None
    if not stat.S_ISREG(info.st_mode):
        raise MeshwardenError(f"the secret key file {path} is not a regular file", path=str(path))
    if info.st_mode & (stat.S_IRWXG | stat.S_IRWXO):
        raise MeshwardenError(
            f"the secret key file {path} is open to other users (mode {stat.S_IMODE(info.st_mode):04o}); "
            f"make it private with: chmod 600 {path}",
            path=str(path),
            mode=f"{stat.S_IMODE(info.st_mode):04o}",
        )


def write_keypair(directory: Path, name: str) -> tuple[Path, Path]:
    """Create NAME.key (public) and NAME.key_secret (secret, mode 0600 whatever the umask) in
    ``directory``. The secret file is made private before a key is written into it, so no
    reader can catch it open; an existing pair is never overwritten (a daemon may trust it)."""
    directory.mkdir(parents=True, exist_ok=True)
    secret_path = directory / f"{name}.key_secret"
    public_path = directory / f"{name}.key"
    for path in (public_path, secret_path):
        if path.exists():
            raise MeshwardenError(f"{path} already exists; remove it first or choose another name", path=str(path))
    fd = os.open(secret_path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    try:
        os.fchmod(fd, 0o600)  # the mode given to open() is narrowed by the umask, never widened
    finally:
        os.close(fd)
    public, secret = zmq.auth.create_certificates(str(directory), name)  # rewrites the file, keeps its mode
    return Path(public), Path(secret)
