"""Named settings an engineer saves and comes back to: `meshwarden save NAME`, `meshwarden load NAME`.

A settings file is JSON (format ``meshwarden-settings/1``): per actuator its volts, its logical
value (or null) and the calibration version that value was made with. NAME is a file path when
it contains a ``/`` or ends in ``.json``; otherwise ``NAME.json`` in the settings folder: beside
the journal of ``--config`` (``<journal folder>/settings``), else the user data folder
(``$XDG_DATA_HOME/meshwarden/settings``). `load` sets the saved values through the daemon's
guard like any `set` (ramped, limits checked, all or nothing); an actuator whose calibration
changed since is named, and ``--volts`` loads the exact volts instead of the logical values.
"""

from __future__ import annotations

import argparse
import json
import re
import sys
import time
from pathlib import Path
from typing import Any

from meshwarden.cli_common import UsageError, loaded_config, open_client
from meshwarden.cli_motion import run_values
from meshwarden.cli_values import values_from_document
from meshwarden.service.daemon import user_data_dir

FORMAT = "meshwarden-settings/1"
_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,63}$")


def settings_path(args: argparse.Namespace) -> Path:
    name = args.name
    if "/" in name or name.endswith(".json"):
        return Path(name)
    if not _NAME.match(name):
        raise UsageError(f"settings name {name!r}: use letters, digits, '_', '-', '.' (or give a path ending in .json)")
    config = loaded_config(args)
    folder = config.journal.path.parent / "settings" if config is not None else user_data_dir() / "settings"
    return folder / f"{name}.json"


def cmd_save(args: argparse.Namespace) -> int:
    path = settings_path(args)
    if path.exists() and not args.force:
        raise UsageError(f"{path} exists; give --force to replace it")
    with open_client(args) as client:
        view = client.get()
    document: dict[str, Any] = {
        "format": FORMAT,
        "saved_at": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
        "armed": view["armed"],
        "actuators": {
            aid: {"volts": a["volts"], "value": a["value"], "calibration_version": a.get("calibration_version")}
            for aid, a in view["actuators"].items()
        },
    }
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(json.dumps(document, indent=2, sort_keys=True) + "\n", encoding="utf-8")
    live = sum(1 for a in document["actuators"].values() if a["volts"] > 0)
    print(f"saved {len(document['actuators'])} actuators ({live} above 0 V) to {path}")
    return 0


def cmd_load(args: argparse.Namespace) -> int:
    path = settings_path(args)
    try:
        document = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise UsageError(f"no saved settings at {path}") from None
    except (OSError, ValueError) as exc:
        raise UsageError(f"cannot read {path}: {exc}") from None
    if not isinstance(document, dict) or document.get("format") != FORMAT:
        raise UsageError(f"{path} is not a settings file ({FORMAT})")
    values, volts = values_from_document(document, args.volts)
    if not volts:
        with open_client(args) as client:
            now = client.get()["actuators"]
        changed = [
            aid
            for aid, saved in document["actuators"].items()
            if aid in now and saved.get("calibration_version") != now[aid].get("calibration_version")
        ]
        if changed:
            print(
                f"meshwarden: calibration changed since {path.name} was saved for {', '.join(changed[:8])}"
                f"{' ...' if len(changed) > 8 else ''}: loading the logical values (the new calibration's volts); "
                "give --volts for the saved volts",
                file=sys.stderr,
            )
    return run_values(args, values, volts, set())
