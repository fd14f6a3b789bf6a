"""Read YAML configuration files into plain values, remembering where each value came from.

Configuration errors must point at a file and a line, even when the value sits in an included
file. PyYAML's ``compose`` keeps a mark on every node; this module walks the node tree, builds
plain Python values (dict, list, str, int, float, bool, None) and records the mark of every
path in a :class:`Locations` table. ``!include other.yaml`` on any value replaces it with the
content of that file, resolved relative to the including file; missing files and include
cycles are reported at the line of the ``!include``.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import yaml

from meshwarden.errors import ConfigError, ConfigIssue

INCLUDE_TAG = "!include"

PathKey = tuple[str | int, ...]


def dotted(path: PathKey) -> str:
    """``("chip", "actuators", 3, "id")`` -> ``chip.actuators[3].id``."""
    out = ""
    for part in path:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            out += f".{part}" if out else part
    return out


@dataclass(frozen=True)
class Mark:
    """Where a value was written: file as the user named it, 1-based line."""

    file: str
    line: int
    directory: Path = field(default=Path("."), compare=False)


@dataclass
class Locations:
    """The mark of every path read, and of every mapping's keys, for pointing errors at lines."""

    marks: dict[PathKey, Mark] = field(default_factory=dict)
    files: list[Path] = field(default_factory=list)

    def mark(self, path: PathKey) -> Mark:
        """The mark of ``path``, or of its nearest ancestor that has one."""
        probe = path
        while probe not in self.marks and probe:
            probe = probe[:-1]
        if probe in self.marks:
            return self.marks[probe]
        top = self.files[0] if self.files else Path("<config>")
        return Mark(_display(top), 1, top.parent)

    def issue(self, path: PathKey, message: str) -> ConfigIssue:
        """A :class:`ConfigIssue` located at ``path``."""
        where = self.mark(path)
        return ConfigIssue(where.file, where.line, dotted(path), message)


def _display(path: Path) -> str:
    """A path as short as it can be while still unambiguous for the user."""
    try:
        return path.resolve().relative_to(Path.cwd().resolve()).as_posix()
    except ValueError:
        return path.as_posix()


class _Reader:
    """One load: the include stack for cycle detection and the table of locations."""

    def __init__(self) -> None:
        self.locations = Locations()
        self.stack: list[Path] = []
        self.scalars = yaml.constructor.SafeConstructor()

    def load_file(self, path: Path, at: PathKey, included_from: tuple[Mark, PathKey] | None) -> Any:
        resolved = path.resolve()
        if resolved in self.stack:
            chain = " -> ".join(_display(p) for p in [*self.stack, resolved])
            raise self._fail(included_from, at, path, f"include cycle: {chain}")
        try:
            text = resolved.read_text(encoding="utf-8")
        except FileNotFoundError:
            raise self._fail(included_from, at, path, f"file not found: {_display(path)}") from None
        except (OSError, UnicodeDecodeError) as exc:
            raise self._fail(included_from, at, path, f"cannot read {_display(path)}: {exc}") from None
        self.locations.files.append(resolved)
        self.stack.append(resolved)
        try:
            try:
                node = yaml.compose(text, Loader=yaml.SafeLoader)
            except yaml.MarkedYAMLError as exc:
                mark = exc.problem_mark or exc.context_mark
                line = mark.line + 1 if mark else 1
                problem = exc.problem or exc.context or "syntax error"
                raise ConfigError([ConfigIssue(_display(path), line, "", f"YAML syntax error: {problem}")]) from None
            except yaml.YAMLError as exc:
                raise ConfigError(
                    [ConfigIssue(_display(path), 1, "", f"YAML error: {' '.join(str(exc).split())}")]
                ) from None
            if node is None:
                self.locations.marks.setdefault(at, Mark(_display(path), 1, resolved.parent))
                return None
            return self.build(node, at, resolved)
        finally:
            self.stack.pop()

    def _fail(self, included_from: tuple[Mark, PathKey] | None, at: PathKey, path: Path, msg: str) -> ConfigError:
        if included_from is None:
            return ConfigError([ConfigIssue(_display(path), 1, "", msg)])
        mark, where = included_from
        return ConfigError([ConfigIssue(mark.file, mark.line, dotted(where), msg)])

    def build(self, node: yaml.Node, at: PathKey, file: Path) -> Any:
        mark = Mark(_display(file), node.start_mark.line + 1, file.parent)
        self.locations.marks.setdefault(at, mark)
        if node.tag == INCLUDE_TAG:
            if not isinstance(node, yaml.ScalarNode) or not str(node.value).strip():
                raise ConfigError([ConfigIssue(mark.file, mark.line, dotted(at), "!include takes a file name")])
            return self.load_file(file.parent / str(node.value).strip(), at, (mark, at))
        if isinstance(node, yaml.MappingNode):
            out: dict[str, Any] = {}
            for key_node, value_node in node.value:
                key_mark = Mark(_display(file), key_node.start_mark.line + 1, file.parent)
                if not isinstance(key_node, yaml.ScalarNode):
                    raise ConfigError(
                        [ConfigIssue(key_mark.file, key_mark.line, dotted(at), "keys must be plain names")]
                    )
                key = str(key_node.value)
                if key in out:
                    raise ConfigError(
                        [ConfigIssue(key_mark.file, key_mark.line, dotted((*at, key)), "key appears twice")]
                    )
                self.locations.marks[(*at, key)] = key_mark
                out[key] = self.build(value_node, (*at, key), file)
            return out
        if isinstance(node, yaml.SequenceNode):
            return [self.build(item, (*at, i), file) for i, item in enumerate(node.value)]
        if node.tag.startswith("!") and not node.tag.startswith("!!"):
            raise ConfigError([ConfigIssue(mark.file, mark.line, dotted(at), f"unknown tag {node.tag}")])
        try:
            return self.scalars.construct_object(node, deep=True)
        except yaml.YAMLError as exc:
            raise ConfigError(
                [ConfigIssue(mark.file, mark.line, dotted(at), f"bad value: {' '.join(str(exc).split())}")]
            ) from None


def read_yaml(path: Path) -> tuple[Any, Locations]:
    """Read ``path`` and its includes; return the plain value and where each part came from.

    Raises :class:`ConfigError` with a located issue for syntax errors, missing includes and
    include cycles.
    """
    reader = _Reader()
    value = reader.load_file(Path(path), (), None)
    return value, reader.locations
