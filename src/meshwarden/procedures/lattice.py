"""The topology of a lattice of gates, and how light labelled by origin spreads through it.

Convention (the simulator's, sim/meshsim/physics/optics.py): a gate at (column c, top mode k) is a
tunable coupler on modes k and k+1 followed by a phase shifter on mode k; columns are applied in
order 0, 1, ...; a tap (after column c, mode k) sees mode k's power after column c (after
column -1 means at the input); input modes carry the laser light, mutually coherent.

Light is followed as sets of labels per mode, not as fields: a gate set to bar or cross passes its
inputs' labels on unchanged or swapped, a gate that splits (set to a ratio, or an uncalibrated
coupler of unknown ratio) gives both outputs the union of both inputs' labels. A tap that sees a
single tracked label measures that label's light there, and the light it measures is relabelled
"spent" (still light, so it still spoils anything it later mixes with).
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from meshwarden.procedures.inputs import ProcedureInputError

Labels = dict[int, frozenset[str]]


@dataclass(frozen=True)
class LatticeTopology:
    """Modes, gates {id: (column, top mode)}, taps {monitor id: (after column, mode)} and input modes."""

    modes: int
    gates: Mapping[str, tuple[int, int]]
    taps: Mapping[str, tuple[int, int]]
    input_modes: tuple[int, ...]
    _at: dict[tuple[int, int], str] = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        if isinstance(self.modes, bool) or not isinstance(self.modes, int) or self.modes < 2:
            raise ProcedureInputError(f"a lattice needs at least 2 modes, got {self.modes!r}")
        at: dict[tuple[int, int], str] = {}
        for gate, (column, top) in self.gates.items():
            if column < 0 or not 0 <= top <= self.modes - 2:
                raise ProcedureInputError(f"gate {gate}: column {column}, top mode {top} is outside the lattice")
            for mode in (top, top + 1):
                if (column, mode) in at:
                    raise ProcedureInputError(
                        f"gates {at[column, mode]} and {gate} share mode {mode} in column {column}"
                    )
                at[column, mode] = gate
        for monitor, (after, mode) in self.taps.items():
            if not -1 <= after <= self.columns - 1 or not 0 <= mode < self.modes:
                raise ProcedureInputError(f"tap {monitor}: after column {after}, mode {mode} is outside the lattice")
        if not self.input_modes or len(set(self.input_modes)) != len(self.input_modes):
            raise ProcedureInputError(f"input modes must be distinct and at least one, got {list(self.input_modes)}")
        if any(not 0 <= m < self.modes for m in self.input_modes):
            raise ProcedureInputError(f"input modes {list(self.input_modes)} must lie in 0..{self.modes - 1}")
        object.__setattr__(self, "_at", at)

    @classmethod
    def from_lattice(
        cls,
        modes: int,
        columns: Sequence[Mapping[str, int]],
        taps: Mapping[str, Sequence[int]],
        input_modes: Iterable[int],
    ) -> LatticeTopology:
        """From the simulator's ``lattice:`` layout (columns of {gate: top mode}, taps {monitor: [after, mode]})."""
        gates = {gate: (c, int(top)) for c, column in enumerate(columns) for gate, top in column.items()}
        bad = [m for m, spec in taps.items() if len(spec) != 2]
        if bad:
            raise ProcedureInputError(f"tap {bad[0]} must be [after column, mode]")
        return cls(modes, gates, {m: (int(a), int(k)) for m, (a, k) in taps.items()}, tuple(input_modes))

    @property
    def columns(self) -> int:
        """Number of columns (the highest gate column + 1)."""
        return 1 + max((c for c, _ in self.gates.values()), default=-1)

    def gate_at(self, column: int, mode: int) -> str | None:
        """The gate touching ``mode`` in ``column``, if any."""
        return self._at.get((column, mode))

    def taps_at(self, after: int, mode: int) -> list[str]:
        """Monitors tapping ``mode`` after column ``after``, sorted."""
        return sorted(m for m, spot in self.taps.items() if spot == (after, mode))

    def as_dict(self) -> dict[str, Any]:
        """JSON-able form."""
        return {
            "modes": self.modes,
            "gates": {g: list(spot) for g, spot in self.gates.items()},
            "taps": {m: list(spot) for m, spot in self.taps.items()},
            "input_modes": list(self.input_modes),
        }


@dataclass
class Flow:
    """Result of following labelled light: labels per mode at the end, what taps captured, gates touched."""

    labels: Labels
    captured: dict[str, list[str]] = field(default_factory=dict)
    touched: set[str] = field(default_factory=set)


def propagate(
    topology: LatticeTopology,
    labels: Labels,
    start_after: int,
    stop_after: int,
    setting_of: Mapping[str, str],
    tracked: frozenset[str] = frozenset(),
) -> Flow:
    """Follow ``labels`` (the state after column ``start_after``) to the state after ``stop_after``.

    ``setting_of[gate]`` is "bar", "cross" or "split" for every gate. Taps from ``start_after`` on
    capture tracked labels seen alone.
    """
    flow = Flow(labels={m: s for m, s in labels.items() if s})
    _taps(topology, flow, start_after, tracked)
    for column in range(start_after + 1, stop_after + 1):
        for mode in range(topology.modes - 1):
            gate = topology.gate_at(column, mode)
            if gate is None or topology.gates[gate][1] != mode:
                continue
            top, bottom = flow.labels.get(mode, frozenset()), flow.labels.get(mode + 1, frozenset())
            if top or bottom:
                flow.touched.add(gate)
            setting = setting_of[gate]
            if setting == "cross":
                top, bottom = bottom, top
            elif setting == "split":
                top = bottom = top | bottom
            flow.labels[mode], flow.labels[mode + 1] = top, bottom
        _taps(topology, flow, column, tracked)
    flow.labels = {m: s for m, s in flow.labels.items() if s}
    return flow


def _taps(topology: LatticeTopology, flow: Flow, after: int, tracked: frozenset[str]) -> None:
    for mode, labels in list(flow.labels.items()):
        if len(labels) == 1 and labels <= tracked:
            monitors = topology.taps_at(after, mode)
            if monitors:
                flow.captured.setdefault(next(iter(labels)), []).extend(monitors)
                flow.labels[mode] = frozenset({"spent"})
