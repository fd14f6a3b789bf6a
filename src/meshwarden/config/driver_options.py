"""Each board driver's own options (the board's ``options`` mapping), read with file:line errors.

``reference`` takes none; ``scpi`` takes :class:`~meshwarden.config.model.ScpiOptions`, each
command template checked for the placeholders its command may use; a driver from another
package (an entry point) gets its mapping as written, to check when it is created.
"""

from __future__ import annotations

import string
from collections.abc import Callable
from dataclasses import fields
from typing import Any

from meshwarden.config import fields as f
from meshwarden.config.model import TERMINATIONS, ScpiOptions
from meshwarden.config.source import PathKey
from meshwarden.units import VOLTS

# template key -> the placeholders its command may use (it must use the required ones)
TEMPLATES: dict[str, tuple[frozenset[str], frozenset[str]]] = {
    "identify": (frozenset(), frozenset()),
    "set_volts": (frozenset({"channel", "volts"}), frozenset({"channel", "volts"})),
    "query_volts": (frozenset({"channel"}), frozenset({"channel"})),
    "set_limit": (frozenset({"channel", "volts"}), frozenset({"channel", "volts"})),
    "output_on": (frozenset({"channel"}), frozenset({"channel"})),
    "output_off": (frozenset({"channel"}), frozenset({"channel"})),
    "query_output": (frozenset({"channel"}), frozenset({"channel"})),
    "read_sense": (frozenset({"channel"}), frozenset({"channel"})),
    "read_input": (frozenset({"input", "integration_s"}), frozenset({"input"})),
    "set_gain": (frozenset({"input", "ohms"}), frozenset({"input", "ohms"})),
    "error_query": (frozenset(), frozenset()),
    "event_status": (frozenset(), frozenset()),
    "clear_status": (frozenset(), frozenset()),
    "interlock_query": (frozenset(), frozenset()),
    "watchdog": (frozenset({"timeout_s", "action"}), frozenset({"timeout_s", "action"})),
    "watchdog_query": (frozenset(), frozenset()),
    "reset": (frozenset(), frozenset()),
}
REQUIRED_TEMPLATES = ("identify", "set_volts", "query_volts", "error_query", "event_status", "clear_status", "reset")
SCPI_KEYS = tuple(field.name for field in fields(ScpiOptions))


def _template(key: str) -> Callable[[Any], str]:
    allowed, required = TEMPLATES[key]

    def convert(value: Any) -> str:
        text = f.text(value)
        if "\n" in text or "\r" in text:
            raise ValueError("a command template is one line (the driver adds the termination)")
        names = _placeholders(text)
        unknown = names - allowed
        if unknown:
            allowed_text = ", ".join(f"{{{n}}}" for n in sorted(allowed)) or "none"
            raise ValueError(f"unknown placeholder {{{sorted(unknown)[0]}}} (this command may use {allowed_text})")
        missing = required - names
        if missing:
            raise ValueError(f"the template must contain {{{sorted(missing)[0]}}}")
        return text

    return convert


def _placeholders(template: str) -> set[str]:
    """The placeholders a template uses (``{channel}`` ...); a ValueError if malformed."""
    names = set()
    try:
        parsed = list(string.Formatter().parse(template))
    except ValueError:
        raise ValueError(f"template {template!r}: unbalanced braces (write a literal brace as {{{{ or }}}})") from None
    for _, name, spec, conversion in parsed:
        if name is None:
            continue
        if not name.isidentifier() or spec or conversion:
            raise ValueError(f"template {template!r}: use plain placeholders such as {{channel}}")
        names.add(name)
    return names


def _words(value: Any) -> tuple[str, str, str]:
    if not isinstance(value, list) or len(value) != 3 or not all(isinstance(v, str) and v.strip() for v in value):
        raise ValueError("expected three words: for off, hold and ramp_to_zero, e.g. [OFF, HOLD, ZERO]")
    return (value[0], value[1], value[2])


def scpi_options(p: f.Problems, path: PathKey, raw: Any) -> ScpiOptions | None:
    """The options of a ``driver: scpi`` board; None after recording a problem."""
    s = f.Section(p, raw, path, SCPI_KEYS, what="driver's options")
    d = ScpiOptions()
    values: dict[str, Any] = {}
    for key in TEMPLATES:
        default = getattr(d, key)
        if key in REQUIRED_TEMPLATES:
            values[key] = s.get(key, _template(key), default)
        elif key in s.value and s.value[key] is None:
            values[key] = None  # the instrument has no such command
        else:
            values[key] = s.get(key, _template(key), default)
    values.update(
        write_termination=s.get("write_termination", f.choice(*TERMINATIONS), d.write_termination),
        read_termination=s.get("read_termination", f.choice(*TERMINATIONS), d.read_termination),
        channel_base=s.get("channel_base", f.integer(0, 1), d.channel_base),
        units_per_line=s.get("units_per_line", f.integer(1, 1024), d.units_per_line),
        expect_model=s.get("expect_model", f.text, d.expect_model),
        watchdog_words=s.get("watchdog_words", _words, d.watchdog_words),
        allow_reset=s.get("allow_reset", f.boolean, d.allow_reset),
        adc_full_scale_volts=s.get("adc_full_scale_volts", f.quantity(VOLTS, maximum=100.0), d.adc_full_scale_volts),
    )
    if not s.ok or any(v is f.BAD for v in values.values()):
        return None
    return ScpiOptions(**values)


def driver_options(p: f.Problems, path: PathKey, driver: str, raw: Any) -> Any:
    """The board's ``options`` for its driver (``f.BAD`` after recording a problem)."""
    if driver == "scpi":
        options = scpi_options(p, path, raw)
        return f.BAD if options is None else options
    if driver == "reference":
        if raw is not None:
            p.add(path, "the reference driver takes no options")
            return f.BAD
        return None
    if raw is not None and not isinstance(raw, dict):
        p.add(path, f"expected a mapping of options for driver '{driver}'")
        return f.BAD
    return raw
