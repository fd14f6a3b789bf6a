"""Readable tables for the command line's default (non ``--json``) output."""

from __future__ import annotations

from typing import Any


def _fmt(value: Any) -> str:
    if value is None:
        return "-"
    if isinstance(value, float):
        return f"{value:.6g}"
    return str(value)


def render(op: str, result: Any) -> str:
    if op == "get":
        lines = [
            f"armed: {result['armed']}   estopped: {result['estopped']}",
            f"{'actuator':<10}{'kind':<9}{'board':<7}{'ch':>4}{'volts':>11}{'code':>8}{'limit V':>9}  value",
        ]
        for aid, a in result["actuators"].items():
            lines.append(
                f"{aid:<10}{a['kind']:<9}{a['board']:<7}{a['channel']:>4}{a['volts']:>11.4f}"
                f"{a['code']:>8}{a['limit_v']:>9.2f}  {_fmt(a['value'])}"
            )
        return "\n".join(lines)
    if op == "monitors":
        lines = [f"{'monitor':<10}{'counts':>10}{'photocurrent A':>16}{'optical W':>14}"]
        for mid, m in result.items():
            lines.append(f"{mid:<10}{m['counts']:>10.1f}{m['amps']:>16.4e}{m['watts']:>14.4e}")
        return "\n".join(lines)
    if op == "set":
        applied = result.get("applied", {})
        lines = [f"{result.get('job', '')}: {result.get('state', '')}"]
        for aid, a in applied.items():
            lines.append(f"  {aid:<10}{a['volts']:>10.4f} V  code {a['code']:>6}  value {_fmt(a['value'])}")
        return "\n".join(lines)
    if op == "status":
        boards = ", ".join(
            f"{b}: boot {s['boot_count']}{' FAULTED' if s['faulted'] else ''}"
            f"{' needs restore' if s['needs_restore'] else ''}"
            f"{'' if s.get('interlock') is None else ', interlock ' + str(s['interlock'])}"
            for b, s in result["boards"].items()
        )
        jobs, leases = len(result.get("jobs", [])), len(result.get("leases", {}))
        return (
            f"armed: {result['armed']}   estopped: {result['estopped']}   version {result.get('version')}\n"
            f"boards: {boards}\njobs running: {jobs}   leases: {leases}"
        )
    if op == "estop":
        return "emergency stop: " + ", ".join(f"{b} {s}" for b, s in result.items())
    return "\n".join(f"{k}: {_fmt(v)}" for k, v in result.items()) if isinstance(result, dict) else _fmt(result)
