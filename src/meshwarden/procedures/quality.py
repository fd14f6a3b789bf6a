"""The verdict of a quality gate: passed or not, why, and the numbers it looked at."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any


@dataclass(frozen=True)
class GateResult:
    """Whether a fit or table may be used; ``reason`` names every failed check ("" when ok)."""

    ok: bool
    reason: str
    checks: dict[str, float] = field(default_factory=dict)

    def as_dict(self) -> dict[str, Any]:
        """JSON-able form."""
        return {"ok": self.ok, "reason": self.reason, "checks": dict(self.checks)}


def gate(checks: dict[str, float], failures: list[str]) -> GateResult:
    """A :class:`GateResult` from the numbers looked at and the failure messages collected."""
    return GateResult(ok=not failures, reason="; ".join(failures), checks=dict(checks))


def plain(value: Any) -> Any:
    """``value`` with tuples as lists and numpy numbers as Python numbers, recursively (for JSON)."""
    if isinstance(value, dict):
        return {str(k): plain(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [plain(v) for v in value]
    if hasattr(value, "item") and callable(value.item):
        return value.item()
    return value


def plain_dict(value: dict[str, Any]) -> dict[str, Any]:
    """:func:`plain` of a dict, typed as one."""
    return {str(k): plain(v) for k, v in value.items()}
