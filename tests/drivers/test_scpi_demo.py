"""The demo's light routing, end to end, on boards that speak SCPI: `meshsim serve` with the SCPI
personality on ptys in one process, `meshwarden serve` with the scpi driver in another, and the
example experiment's steps through the client library."""

from __future__ import annotations

from pathlib import Path

from meshwarden.client import Client
from tests.conftest import REPO, route_light_script
from tests.service.daemon import start_daemon
from tests.sim.test_transports import start_server, stop_server

DEMO_SCPI = REPO / "config" / "demo-scpi.yaml"


def _local_copy(tmp_path: Path) -> Path:
    """The shipped SCPI demo configuration with its journal in ``tmp_path`` (includes and the
    calibration still read from the repository)."""
    demo = (REPO / "config").as_posix()
    text = DEMO_SCPI.read_text(encoding="utf-8")
    text = text.replace("!include demo/", f"!include {demo}/demo/").replace(
        "directory: demo/", f"directory: {demo}/demo/"
    )
    text = text.replace("path: ../var/demo-scpi-journal.sqlite", "path: journal.sqlite")
    path = tmp_path / "demo-scpi.yaml"
    path.write_text(text, encoding="utf-8")
    return path


def test_demo_routes_light_on_the_scpi_personality(tmp_path: Path) -> None:
    """Arm, switch the gates on the path to output mode 5 to cross in one request, read the
    output monitors: most of the light leaves at mode 5; the interlock is reported closed."""
    route = route_light_script()
    config = _local_copy(tmp_path)
    sim, ports = start_server(tmp_path, "pty", config=config)
    try:
        daemon = start_daemon(config, tmp_path, ports=ports)
        try:
            with Client(daemon.endpoint, daemon.pub, timeout_s=20.0) as mw:
                status = mw.status()
                assert status["boards"]["b0"]["interlock"] == "closed"
                mw.arm()
                before = route.outputs(mw)  # type: ignore[attr-defined]
                path = route.schedules(5)[0][0]  # type: ignore[attr-defined]  # crossing at once: g00 .. g32
                mw.set({f"{g}.kappa": 0.99 for g in path})
                after = route.outputs(mw)  # type: ignore[attr-defined]
                mw.disarm()
                state = mw.get()
        finally:
            assert daemon.stop() == 0
        assert "Traceback" not in daemon.log.read_text()
    finally:
        err = stop_server(sim)
    assert "Traceback" not in err, err
    assert before.index(max(before)) == 0  # every gate in bar state: light stays in mode 0
    assert after.index(max(after)) == 5
    assert after[5] / sum(after) > 0.5
    assert all(a["code"] == 0 for a in state["actuators"].values())
