"""In-process simulated racks, by name, for the ``meshsim://`` pyserial URL.

``meshsim://NAME/BOARD?config=PATH[&seed=N][&faults=SPEC][&time_scale=X]`` opens board BOARD of
the rack NAME, creating the rack from PATH on first use. All boards of one rack share one chip,
so a gate wired across two boards behaves as one device. Tests may :func:`register` a rack they
built themselves (with a manual clock, say) and inspect it with :func:`get`.
"""

from __future__ import annotations

import threading
from pathlib import Path
from urllib.parse import parse_qs, urlparse

from meshsim.clock import SimClock
from meshsim.rack import SimRack

_racks: dict[str, SimRack] = {}
_sources: dict[str, Path] = {}
_open: set[tuple[str, str]] = set()
_lock = threading.Lock()


class InProcessError(ValueError):
    """A meshsim:// URL that names no rack, no board, or a rack with another configuration."""


def parse_url(url: str) -> tuple[str, str, dict[str, str]]:
    """``meshsim://NAME/BOARD?k=v`` -> (NAME, BOARD, {k: v})."""
    parts = urlparse(url)
    if parts.scheme != "meshsim" or not parts.netloc or not parts.path.strip("/"):
        raise InProcessError(f"expected meshsim://RACK/BOARD[?config=PATH...], got {url!r}")
    options = {k: v[-1] for k, v in parse_qs(parts.query).items()}
    unknown = set(options) - {"config", "seed", "faults", "time_scale"}
    if unknown:
        raise InProcessError(f"unknown option(s) {', '.join(sorted(unknown))} in {url!r}")
    return parts.netloc, parts.path.strip("/"), options


def register(name: str, rack: SimRack) -> SimRack:
    """Make ``rack`` reachable as ``meshsim://name/...``."""
    with _lock:
        _racks[name] = rack
        _sources.pop(name, None)
    return rack


def get(name: str) -> SimRack:
    """The running rack ``name`` (for inspection in tests)."""
    with _lock:
        if name not in _racks:
            raise InProcessError(f"no simulated rack named {name!r}")
        return _racks[name]


def remove(name: str) -> None:
    """Forget rack ``name``; the next URL that names it builds a new one."""
    with _lock:
        _racks.pop(name, None)
        _sources.pop(name, None)


def attach(url: str) -> tuple[SimRack, str]:
    """The rack and board id a URL names, creating the rack if needed; one opener per board."""
    name, board, options = parse_url(url)
    with _lock:
        rack = _racks.get(name)
        config = Path(options["config"]).resolve() if "config" in options else None
        if rack is None:
            if config is None:
                raise InProcessError(f"no simulated rack {name!r} yet, and {url!r} gives no config= to build it")
            rack = SimRack.from_config(
                config,
                seed=int(options["seed"]) if "seed" in options else None,
                faults=options.get("faults", ""),
                clock=SimClock(float(options.get("time_scale", 1.0))),
            )
            _racks[name] = rack
            _sources[name] = config
        elif config is not None and name in _sources and _sources[name] != config:
            raise InProcessError(f"rack {name!r} was built from {_sources[name]}, not {config}")
        if board not in rack.boards:
            raise InProcessError(f"rack {name!r} has no board {board!r} (it has {', '.join(rack.boards)})")
        if (name, board) in _open:
            raise InProcessError(f"meshsim://{name}/{board} is already open (ports are exclusive)")
        _open.add((name, board))
    return rack, board


def detach(url: str) -> None:
    name, board, _ = parse_url(url)
    with _lock:
        _open.discard((name, board))
