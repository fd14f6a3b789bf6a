"""Configuration: YAML files in, one validated immutable :class:`Config` out.

``load_config(path)`` either returns a configuration in which every reference resolves and
every limit is safe, or raises :class:`~meshwarden.errors.ConfigError` listing each problem as
``file:line: dotted.path: message``. Nothing half-valid ever reaches the controller.
"""

from __future__ import annotations

from pathlib import Path

from meshwarden.config.build import build_config
from meshwarden.config.checks import check_config
from meshwarden.config.dump import dump_config, dump_config_text
from meshwarden.config.fields import Problems
from meshwarden.config.model import (
    ActuatorConfig,
    BoardConfig,
    ChipConfig,
    Config,
    GateConfig,
    JournalConfig,
    MonitorConfig,
    RackConfig,
    SafetyConfig,
    ServiceConfig,
    Terminal,
    WatchdogConfig,
)
from meshwarden.config.source import read_yaml
from meshwarden.config.summary import summarize
from meshwarden.errors import ConfigError

__all__ = [
    "ActuatorConfig",
    "BoardConfig",
    "ChipConfig",
    "Config",
    "ConfigError",
    "GateConfig",
    "JournalConfig",
    "MonitorConfig",
    "RackConfig",
    "SafetyConfig",
    "ServiceConfig",
    "Terminal",
    "WatchdogConfig",
    "dump_config",
    "dump_config_text",
    "load_config",
    "summarize",
]


def load_config(path: str | Path) -> Config:
    """Read, build and cross-check the configuration at ``path``."""
    raw, locations = read_yaml(Path(path))
    problems = Problems(locations)
    config = build_config(problems, raw, Path(path).resolve())
    if config is not None:
        check_config(config, problems)
    if problems.issues or config is None:
        raise ConfigError(problems.issues)
    return config
