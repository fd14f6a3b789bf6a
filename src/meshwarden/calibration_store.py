"""Calibration versions on disk: immutable folders of per-actuator tables, and which one is active.

Layout, beside the journal (the daemon's state folder, never the configuration's own folder)::

    calibration/
      versions/cal-20261202-101500/manifest.yaml   provenance: date, method, points, residuals,
                                    c00.yaml ...   configuration hash, per-actuator outcome
                                    sweeps.json    the measured points and fit per actuator (plots)
      active                                       the active version's name (one line)

The tables the configuration names (``calibration.directory``) are the version ``config``: always
there, never written, the one a rollback of everything returns to. A version folder is written
once, under a temporary name, and renamed into place (atomic on POSIX), so a reader never sees a
half-written version; nothing writes into it afterwards.

The sweeps are JSON, apart from the manifest: ``calibration list`` reads every manifest, and the
points (tens of kilobytes for a chip) would slow it for nothing. Versions written before the
sweeps were kept have no such file: :meth:`CalibrationStore.sweeps` says ``None``.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
from pathlib import Path
from typing import Any

import yaml

from meshwarden.calibration import CalibrationTable, dump_calibration, load_calibration
from meshwarden.errors import CalibrationError, MeshwardenError, UnknownTargetRefused

BASE_VERSION = "config"
SWEEPS_FILE = "sweeps.json"
SWEEPS_FORMAT = "meshwarden-calibration-sweeps/1"
# A version's folder name: never '.' or '..' (the folders above it) nor a staging folder's '.name.partial'.
_NAME = re.compile(r"^[A-Za-z0-9_-][A-Za-z0-9_.-]{0,63}$")


def config_hash(source: Path | None) -> str:
    """A short digest of the configuration text the tables were measured under."""
    if source is None or not Path(source).exists():
        return ""
    return hashlib.sha256(Path(source).read_bytes()).hexdigest()[:16]


class CalibrationStore:
    """Versions under ``root``; the configuration's own tables are the version ``config``."""

    def __init__(self, root: Path) -> None:
        self.root = Path(root)
        self.versions_dir = self.root / "versions"

    def _folder(self, version: str) -> Path:
        if not _NAME.match(version) or version == BASE_VERSION:
            raise UnknownTargetRefused(f"no calibration version '{version}'", target=version)
        return self.versions_dir / version

    def exists(self, version: str) -> bool:
        return version == BASE_VERSION or (_NAME.match(version) is not None and self._folder(version).is_dir())

    def write(
        self,
        version: str,
        tables: dict[str, CalibrationTable],
        manifest: dict[str, Any],
        sweeps: dict[str, dict[str, Any]] | None = None,
    ) -> Path:
        """Write a new version (refused if it exists), with its sweeps if given; returns its folder."""
        folder = self._folder(version)
        if folder.exists():
            raise CalibrationError(f"calibration version '{version}' exists already; versions are immutable")
        self.versions_dir.mkdir(parents=True, exist_ok=True)
        staging = self.versions_dir / f".{version}.partial"
        staging.mkdir(exist_ok=False)
        for actuator, table in tables.items():
            (staging / f"{actuator}.yaml").write_text(dump_calibration(table), encoding="utf-8")
        (staging / "manifest.yaml").write_text(
            yaml.safe_dump(manifest, sort_keys=False, default_flow_style=None, width=100), encoding="utf-8"
        )
        if sweeps is not None:
            record = {"format": SWEEPS_FORMAT, "version": version, "actuators": sweeps}
            (staging / SWEEPS_FILE).write_text(json.dumps(record, separators=(",", ":")), encoding="utf-8")
        os.replace(staging, folder)
        return folder

    def manifest(self, version: str) -> dict[str, Any]:
        path = self._folder(version) / "manifest.yaml"
        if not path.exists():
            raise UnknownTargetRefused(f"no calibration version '{version}'", target=version)
        try:
            data = yaml.safe_load(path.read_text(encoding="utf-8"))
        except (OSError, UnicodeDecodeError, yaml.YAMLError) as exc:
            raise CalibrationError(f"calibration version '{version}': manifest.yaml cannot be read: {exc}") from None
        return data if isinstance(data, dict) else {}

    def sweeps(self, version: str) -> dict[str, dict[str, Any]] | None:
        """The measured points per actuator of a version; None when the version kept none (written
        before sweeps were stored, or the configuration's own tables)."""
        if version == BASE_VERSION:
            return None
        folder = self._folder(version)
        if not folder.is_dir():
            raise UnknownTargetRefused(f"no calibration version '{version}'", target=version)
        path = folder / SWEEPS_FILE
        if not path.exists():
            return None
        try:
            record = json.loads(path.read_text(encoding="utf-8"))
        except (OSError, ValueError) as exc:
            raise CalibrationError(f"calibration version '{version}': {SWEEPS_FILE} cannot be read: {exc}") from None
        actuators = record.get("actuators") if isinstance(record, dict) else None
        if not isinstance(actuators, dict) or record.get("format") != SWEEPS_FORMAT:
            raise CalibrationError(f"calibration version '{version}': {SWEEPS_FILE} is not {SWEEPS_FORMAT}")
        return actuators

    def tables(self, version: str) -> dict[str, CalibrationTable]:
        """Every table of a version (by actuator id)."""
        folder = self._folder(version)
        if not folder.is_dir():
            raise UnknownTargetRefused(f"no calibration version '{version}'", target=version)
        return {p.stem: load_calibration(p) for p in sorted(folder.glob("*.yaml")) if p.name != "manifest.yaml"}

    def names(self) -> list[str]:
        """Stored versions, oldest first (names sort by time)."""
        if not self.versions_dir.is_dir():
            return []
        return sorted(p.name for p in self.versions_dir.iterdir() if p.is_dir() and not p.name.startswith("."))

    def active(self) -> str:
        name = self.chosen()
        return name if self.exists(name) else BASE_VERSION

    def chosen(self) -> str:
        """The version the active pointer names, whether or not it is still stored (the daemon's
        start refuses one that is not, rather than run silently on the configuration's tables)."""
        pointer = self.root / "active"
        try:
            name = pointer.read_text(encoding="utf-8").strip() if pointer.exists() else ""
        except (OSError, UnicodeDecodeError):
            name = "?"  # unreadable: no version by that name, so the start says so
        return name or BASE_VERSION

    def set_active(self, version: str) -> None:
        if not self.exists(version):
            raise UnknownTargetRefused(f"no calibration version '{version}'", target=version)
        self.root.mkdir(parents=True, exist_ok=True)
        staging = self.root / ".active.partial"
        staging.write_text(version + "\n", encoding="utf-8")
        os.replace(staging, self.root / "active")

    def summary(self) -> list[dict[str, Any]]:
        """One row per version (the configuration's own first), for ``calibration list``."""
        active = self.active()
        rows: list[dict[str, Any]] = [{"version": BASE_VERSION, "created": None, "active": active == BASE_VERSION}]
        for name in self.names():
            try:
                manifest = self.manifest(name)
            except MeshwardenError as exc:  # one damaged version must not hide the others
                rows.append({"version": name, "created": None, "active": active == name, "error": exc.message})
                continue
            outcomes = manifest.get("actuators")
            counts: dict[str, int] = {}
            for outcome in outcomes.values() if isinstance(outcomes, dict) else ():
                status = str(outcome.get("status", "?")) if isinstance(outcome, dict) else "?"
                counts[status] = counts.get(status, 0) + 1
            rows.append(
                {
                    "version": name,
                    "created": manifest.get("created"),
                    "active": active == name,
                    "frames": manifest.get("frames"),
                    "counts": counts,
                }
            )
        return rows
