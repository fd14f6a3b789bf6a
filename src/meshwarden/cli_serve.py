"""`meshwarden serve` and `meshwarden check-config`: the commands that read a configuration file."""

from __future__ import annotations

import argparse
import dataclasses
import json
import sys
from pathlib import Path

from meshwarden.config.model import Config
from meshwarden.errors import ConfigError, MeshwardenError

EXIT_OK, EXIT_USAGE = 0, 2
SWITCH_INTERVAL_S = 0.0005  # see cmd_serve: how long a waiting thread may wait for the interpreter


def _say(text: str) -> None:
    print(text, file=sys.stderr, flush=True)


def cmd_check_config(args: argparse.Namespace) -> int:
    from meshwarden.config import load_config, summarize
    from meshwarden.config.cautions import cautions

    try:
        config = load_config(Path(args.path))
    except ConfigError as exc:
        for issue in exc.issues:
            print(issue, file=sys.stderr)
        return EXIT_USAGE
    print(summarize(config))
    for caution in cautions(config):
        print(caution)
    return EXIT_OK


def demo_config() -> tuple[Path, bool]:
    """The demo configuration, and whether it is the installed package's copy."""
    from meshwarden.service.daemon import PACKAGED_DEMO, demo_config_path

    path = demo_config_path()
    return path, path == PACKAGED_DEMO


def _with_user_journal(config: Config) -> Config:
    """The packaged demo keeps its journal in the user data folder, not inside the package."""
    from meshwarden.service.daemon import user_data_dir

    journal = dataclasses.replace(config.journal, path=user_data_dir() / "demo-journal.sqlite")
    return dataclasses.replace(config, journal=journal)


def cmd_serve(args: argparse.Namespace) -> int:
    import asyncio

    from meshwarden.config import load_config
    from meshwarden.service.daemon import serve

    packaged = False
    if args.config:
        path = Path(args.config)
    else:
        path, packaged = demo_config()
        _say(
            "meshwarden: no --config given: serving the DEMO on a simulated rack in this process "
            f"({path}); for your own rack give --config lab.yaml"
        )
    if not path.exists():
        _say(f"meshwarden: no configuration at {path} (give --config PATH)")
        return EXIT_USAGE
    try:
        config = load_config(path)
    except ConfigError as exc:
        for issue in exc.issues:
            print(issue, file=sys.stderr)
        return EXIT_USAGE
    if packaged:
        config = _with_user_journal(config)
        _say(f"meshwarden: demo journal: {config.journal.path}")
    pointer: tuple[Path, bytes | None] | None = None  # the active pointer as it was, if this start moves it
    if args.calibration is not None:
        from meshwarden.calibration_store import CalibrationStore

        store = CalibrationStore(config.journal.path.parent / "calibration")
        active = store.root / "active"
        before = active.read_bytes() if active.exists() else None
        try:  # the pointer moves before the daemon reads it: no output is touched
            store.set_active(args.calibration)
        except MeshwardenError as exc:
            _say(f"meshwarden: {exc.message}")
            return EXIT_USAGE
        pointer = (active, before)
    ports = None
    if args.ports_file:
        try:
            ports = json.loads(Path(args.ports_file).read_text(encoding="utf-8"))
        except (OSError, ValueError) as exc:
            _say(f"meshwarden: cannot read ports file {args.ports_file}: {exc}")
            return EXIT_USAGE
        if not isinstance(ports, dict) or not all(isinstance(k, str) and isinstance(v, str) for k, v in ports.items()):
            _say(f'meshwarden: {args.ports_file} must hold a JSON object {{"board_id": "url"}}')
            return EXIT_USAGE

    serving = False

    def ready(bus: object) -> None:
        nonlocal serving
        serving = True
        _say(f"meshwarden: serving commands on {bus.bound}, telemetry on {bus.pub_bound}")  # type: ignore[attr-defined]

    # The event loop shares the interpreter with a thread per board: a thread that wants the
    # interpreter waits up to one switch interval (5 ms by default) for whoever holds it. A
    # shorter one bounds how long an emergency stop waits behind board work.
    sys.setswitchinterval(SWITCH_INTERVAL_S)
    try:
        asyncio.run(
            serve(
                config,
                ports,
                args.bind,
                args.pub,
                ready,
                shutdown=args.shutdown,
                say=_say,
                run_token=args.run_token,
            )
        )
    except MeshwardenError as exc:
        if pointer is not None and not serving:  # a refused start changes nothing
            _put_back(*pointer)
        if isinstance(exc, ConfigError):
            for issue in exc.issues:
                print(issue, file=sys.stderr)
        else:
            _say(f"meshwarden: {exc.message}")
        return EXIT_USAGE
    return EXIT_OK


def _put_back(active: Path, before: bytes | None) -> None:
    """Leave the active calibration pointer as it was before this start moved it."""
    if before is None:
        active.unlink(missing_ok=True)
        return
    staging = active.with_name(".active.partial")
    staging.write_bytes(before)
    staging.replace(active)
