"""A short human summary of a valid configuration, for `check-config` and the daemon's start-up log."""

from __future__ import annotations

from collections import Counter

from meshwarden.config.model import Config


def summarize(config: Config) -> str:
    """Boards with channels used and free, actuators by kind, gates and monitors."""
    used_outputs = Counter(a.output.board for a in config.chip.actuators)
    used_inputs = Counter(m.input.board for m in config.chip.monitors)
    kinds = Counter(a.kind for a in config.chip.actuators)
    lines = [f"configuration OK: {config.source}" if config.source else "configuration OK"]
    lines.append(f"boards: {len(config.rack.boards)}")
    for b in config.rack.boards:
        lines.append(
            f"  {b.id:<10} {b.url:<28} outputs {used_outputs[b.id]:>3} used / {b.outputs - used_outputs[b.id]:>3} free"
            f"   monitor inputs {used_inputs[b.id]:>3} used / {b.monitor_inputs - used_inputs[b.id]:>3} free"
            f"   {b.dac_bits}-bit DAC, {b.full_scale_volts:g} V full scale"
            f"   watchdog {b.watchdog.timeout_s:g} s -> {b.watchdog.action}"
            f"   driver {b.driver}{', interlock watched' if b.interlock else ''}"
        )
    by_kind = ", ".join(f"{kinds[k]} {k}" for k in ("coupler", "phase"))
    lines.append(f"actuators: {len(config.chip.actuators)} ({by_kind})")
    lines.append(f"gates: {len(config.chip.gates)}")
    spanning = [
        g.id
        for g in config.chip.gates
        if config.chip.actuator(g.coupler).output.board != config.chip.actuator(g.phase).output.board
    ]
    if spanning:
        lines.append(
            f"  spanning two boards: {len(spanning)} ({', '.join(spanning[:6])}{', ...' if len(spanning) > 6 else ''})"
        )
    lines.append(f"monitors: {len(config.chip.monitors)}")
    lines.append(f"safety: pull-in margin {config.safety.pull_in_margin:g}")
    lines.append(f"journal: {config.journal.path}")
    lines.append(f"service: commands {config.service.bind}, telemetry {config.service.pub}")
    return "\n".join(lines)
