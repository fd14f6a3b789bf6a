"""Reading typed fields out of plain YAML values, collecting every problem with its location.

A :class:`Section` wraps one mapping of the file. Asking it for a field converts and checks the
value; a problem is recorded (file, line, dotted path, message) and a sentinel returned, so one
pass reports every independent mistake. Unknown keys are problems too, with the closest known
key suggested, because a misspelt optional key would otherwise be silently ignored and its
default used - a default step limit instead of the one the engineer meant.
"""

from __future__ import annotations

import difflib
import re
from collections.abc import Callable, Iterable
from pathlib import Path
from typing import Any, TypeVar

from meshwarden.config.model import Terminal
from meshwarden.config.source import Locations, PathKey
from meshwarden.errors import ConfigIssue
from meshwarden.units import Dimension, UnitError, parse_quantity

T = TypeVar("T")


class _Bad:
    """The value of a field that had a problem (already recorded)."""

    def __repr__(self) -> str:
        return "<bad>"


BAD: Any = _Bad()
MISSING: Any = object()

ID_PATTERN = re.compile(r"^[A-Za-z][A-Za-z0-9_-]{0,47}$")
TERMINAL_PATTERN = re.compile(r"^\s*([A-Za-z][A-Za-z0-9_-]*)\s*:\s*(\d+)\s*$")


class Problems:
    """The list of issues found so far, with the locations to attach to them."""

    def __init__(self, locations: Locations) -> None:
        self.locations = locations
        self.issues: list[ConfigIssue] = []

    def add(self, path: PathKey, message: str) -> None:
        self.issues.append(self.locations.issue(path, message))

    def directory(self, path: PathKey) -> Path:
        """The folder of the file in which ``path`` was written, for resolving relative paths."""
        return self.locations.mark(path).directory


def suggest(key: str, known: Iterable[str]) -> str:
    close = difflib.get_close_matches(key, list(known), n=1, cutoff=0.5)
    return f" (did you mean '{close[0]}'?)" if close else ""


class Section:
    """One mapping of the configuration, read field by field."""

    def __init__(
        self,
        problems: Problems,
        value: Any,
        path: PathKey,
        known: Iterable[str],
        *,
        what: str = "section",
    ) -> None:
        self.problems = problems
        self.path = path
        self.known = tuple(known)
        self.ok = isinstance(value, dict)
        self.value: dict[str, Any] = value if isinstance(value, dict) else {}
        if value is None:
            self.ok = True
        elif not self.ok:
            problems.add(path, f"expected a mapping for this {what}, got {_kind(value)}")
        for key in self.value:
            if key not in self.known:
                problems.add((*path, key), f"unknown key '{key}'{suggest(key, self.known)}")

    def get(self, key: str, convert: Callable[[Any], T], default: Any = MISSING) -> T:
        """The converted field, its default when absent, or BAD after recording a problem."""
        if key not in self.value or (self.value[key] is None and default is not MISSING):
            if default is MISSING:
                if self.ok:
                    self.problems.add(self.path, f"missing required key '{key}'")
                return BAD  # type: ignore[no-any-return]
            return default  # type: ignore[no-any-return]
        try:
            return convert(self.value[key])
        except (ValueError, TypeError) as exc:
            self.problems.add((*self.path, key), str(exc))
            return BAD  # type: ignore[no-any-return]

    def sub(self, key: str, known: Iterable[str]) -> Section:
        return Section(self.problems, self.value.get(key), (*self.path, key), known)

    def items(self, key: str) -> list[tuple[PathKey, Any]]:
        """The entries of a list field, each with its path; a non-list is a problem."""
        raw = self.value.get(key)
        if raw is None:
            return []
        if not isinstance(raw, list):
            self.problems.add((*self.path, key), f"expected a list, got {_kind(raw)}")
            return []
        return [((*self.path, key, i), item) for i, item in enumerate(raw)]


def _kind(value: Any) -> str:
    if value is None:
        return "nothing"
    return {dict: "a mapping", list: "a list", str: "text", bool: "a boolean", int: "a number", float: "a number"}.get(
        type(value), type(value).__name__
    )


# --- converters: each takes the raw value and returns the typed one or raises ValueError ---


def identifier(value: Any) -> str:
    if not isinstance(value, str) or not ID_PATTERN.match(value):
        raise ValueError(f"{value!r} is not a valid id (a letter, then letters, digits, '_' or '-', at most 48)")
    return value


def text(value: Any) -> str:
    if not isinstance(value, str) or not value.strip():
        raise ValueError(f"expected non-empty text, got {_kind(value)}")
    return value


def integer(low: int, high: int) -> Callable[[Any], int]:
    def convert(value: Any) -> int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise ValueError(f"expected a whole number from {low} to {high}, got {value!r}")
        if not low <= value <= high:
            raise ValueError(f"{value} is out of range (allowed {low} to {high})")
        return value

    return convert


def quantity(
    dimension: Dimension, *, positive: bool = True, minimum: float | None = None, maximum: float | None = None
) -> Callable[[Any], float]:
    def convert(value: Any) -> float:
        try:
            number = parse_quantity(value, dimension)
        except UnitError as exc:
            raise ValueError(str(exc)) from None
        if positive and number <= 0.0:
            raise ValueError(f"must be greater than 0 {dimension.si_unit}, got {number:g}")
        if minimum is not None and number < minimum:
            raise ValueError(f"must be at least {minimum:g} {dimension.si_unit}, got {number:g}")
        if maximum is not None and number > maximum:
            raise ValueError(f"must be at most {maximum:g} {dimension.si_unit}, got {number:g}")
        return number

    return convert


def boolean(value: Any) -> bool:
    if not isinstance(value, bool):
        raise ValueError(f"expected true or false, got {value!r}")
    return value


def fraction(value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float) or not 0.0 <= float(value) < 1.0:
        raise ValueError(f"expected a fraction from 0 to below 1, got {value!r}")
    return float(value)


def choice(*options: str) -> Callable[[Any], str]:
    def convert(value: Any) -> str:
        if value not in options:
            raise ValueError(f"expected one of {', '.join(options)}, got {value!r}{suggest(str(value), options)}")
        return str(value)

    return convert


def terminal(value: Any) -> Terminal:
    match = TERMINAL_PATTERN.match(value) if isinstance(value, str) else None
    if not match:
        raise ValueError(f"expected BOARD:NUMBER such as 'b0:12', got {value!r}")
    return Terminal(match.group(1), int(match.group(2)))


def endpoint(value: Any) -> str:
    if not isinstance(value, str) or not re.match(r"^(tcp://[^\s:]+:\d+|ipc://\S+|inproc://\S+)$", value):
        raise ValueError(f"expected a ZeroMQ endpoint such as 'tcp://127.0.0.1:7640', got {value!r}")
    return value


def path_in(directory: Path) -> Callable[[Any], Path]:
    """A file path, relative to the folder of the file that names it."""

    def convert(value: Any) -> Path:
        if not isinstance(value, str) or not value.strip():
            raise ValueError(f"expected a file path, got {_kind(value)}")
        return (directory / value).resolve()

    return convert


def url_in(directory: Path) -> Callable[[Any], str]:
    """A board URL; ``{config_dir}`` in it becomes the folder of the file that names it."""

    def convert(value: Any) -> str:
        return text(value).replace("{config_dir}", directory.as_posix())

    return convert
