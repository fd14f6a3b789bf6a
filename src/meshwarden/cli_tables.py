"""Readable tables for the command line's default (non ``--json``) output."""

from __future__ import annotations

import time
from typing import Any


def _fmt(value: Any) -> str:
    if value is None:
        return "-"
    if isinstance(value, float):
        return f"{value:.6g}"
    return str(value)


ACTUATOR_HEAD = f"  {'actuator':<10}{'kind':<9}{'output':<9}{'volts':>10}{'code':>8}{'limit V':>9}  {'value':<12}target"


def _actuator_line(aid: str, a: dict[str, Any]) -> str:
    target = a.get("target")
    shown = "-" if not target else f"{_fmt(target['value'])} ({target['volts']:.3f} V)"
    return (
        f"  {aid:<10}{a['kind']:<9}{a['board'] + ':' + str(a['channel']):<9}{a['volts']:>10.4f}"
        f"{a['code']:>8}{a['limit_v']:>9.2f}  {_fmt(a['value']):<12}{shown}"
    )


def actuator_rows(actuators: dict[str, dict[str, Any]]) -> str:
    return "\n".join([ACTUATOR_HEAD, *(_actuator_line(aid, a) for aid, a in actuators.items())])


def _get(result: dict[str, Any]) -> str:
    """Grouped by gate (coupler, then phase), then the actuators in no gate."""
    actuators: dict[str, Any] = result["actuators"]
    lines = [f"armed: {result['armed']}   estopped: {result['estopped']}", ACTUATOR_HEAD]
    seen: set[str] = set()
    for gid, gate in result.get("gates", {}).items():
        lines.append(f"{gid}")
        for aid in (gate["coupler"], gate["phase"]):
            if aid in actuators:
                lines.append(_actuator_line(aid, actuators[aid]))
                seen.add(aid)
    rest = [aid for aid in actuators if aid not in seen]
    if rest:
        lines.append("(in no gate)" if seen else "")
        lines += [_actuator_line(aid, actuators[aid]) for aid in rest]
    lines.append("value: what the output means now (- after disarm, estop or a reset); target: what restore ramps to")
    return "\n".join(lines)


def _boards(boards: dict[str, Any]) -> list[str]:
    out = []
    for b, s in boards.items():
        flags = [
            "FAULTED" if s.get("faulted") else "",
            "needs restore" if s.get("needs_restore") else "",
            f"UNCERTAIN: {s['uncertain']}" if s.get("uncertain") else "",
            f"ZERO NOT CONFIRMED: {s['zero_pending']}" if s.get("zero_pending") else "",
            f"interlock {s['interlock']}" if s.get("interlock") is not None else "",
        ]
        out.append(f"  {b:<8} boot {s['boot_count']}  {'  '.join(f for f in flags if f) or 'ok'}")
    return out


def _status(result: dict[str, Any]) -> str:
    live = result.get("outputs_live")
    lines = [f"armed: {result['armed']}   estopped: {result['estopped']}   version {result.get('version')}"]
    if live is not None:
        lines.append(f"outputs live: {live['count']}, highest {live['highest_volts']:.2f} V")
    lines.append("boards:")
    lines += _boards(result["boards"])
    jobs, leases = len(result.get("jobs", [])), len(result.get("leases", {}))
    lines.append(f"jobs running: {jobs}   leases: {leases}")
    return "\n".join(lines)


def _state(result: dict[str, Any]) -> str:
    return "\n".join(
        [f"armed: {result['armed']}   estopped: {result['estopped']}", "boards:", *_boards(result["boards"])]
    )


def _jobs(result: list[dict[str, Any]]) -> str:
    lines = [f"{'job':<10}{'kind':<8}{'state':<11}{'started':<10}client / error"]
    for j in result:
        started = time.strftime("%H:%M:%S", time.localtime(j["started"]))
        error = (j.get("error") or {}).get("message", "")
        lines.append(f"{j['id']:<10}{j['kind']:<8}{j['state']:<11}{started:<10}{error or j['client']}")
    return "\n".join(lines) if result else "no jobs"


def _events(result: list[dict[str, Any]]) -> str:
    lines = []
    for e in result:
        when = time.strftime("%Y-%m-%d %H:%M:%S", time.localtime(e["ts"]))
        where = " ".join(x for x in (e.get("board"), e.get("actuator")) if x)
        detail = " ".join(f"{k}={_fmt(v)}" for k, v in sorted((e.get("detail") or {}).items()))
        lines.append(f"{e['id']:>6}  {when}  {e['kind']:<16}{where + '  ' if where else ''}{detail}".rstrip())
    return "\n".join(lines) if result else "no events"


def render(op: str, result: Any) -> str:
    if op == "get":
        return _get(result)
    if op == "monitors":
        lines = [f"{'monitor':<10}{'counts':>10}{'photocurrent A':>16}{'optical W':>14}"]
        for mid, m in result.items():
            lines.append(f"{mid:<10}{m['counts']:>10.1f}{m['amps']:>16.4e}{m['watts']:>14.4e}")
        return "\n".join(lines)
    if op == "status":
        return _status(result)
    if op in ("arm", "disarm"):
        return _state(result)
    if op == "restore":
        return "restored:\n" + actuator_rows(result) if result else "nothing to restore"
    if op == "estop":
        return "emergency stop: " + ", ".join(f"{b} {s}" for b, s in result.items())
    if op == "jobs":
        return _jobs(result)
    if op == "events":
        return _events(result)
    if op == "cancel":
        return f"{result['job']}: {'stop requested' if result['cancelled'] else 'not running (nothing to cancel)'}"
    if op == "lease":
        return f"leased for {result['ttl_s']:g} s: {', '.join(result['leased'])}"
    if op == "release":
        return f"released: {', '.join(result['released'])}"
    if isinstance(result, dict):
        return "\n".join(f"{k}: {_fmt(v)}" for k, v in result.items())
    return _fmt(result)
