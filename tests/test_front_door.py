"""The README's front door: scripts/demo runs the main job end to end on a fresh daemon."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
from pathlib import Path

from meshwarden.testing import free_port
from tests.conftest import REPO


def test_demo_runs_the_main_job_end_to_end() -> None:
    """The demo starts the daemon on the embedded simulated rack, routes light with the example
    script, uses the command line, and stops the daemon cleanly."""
    env = dict(os.environ, MESHWARDEN_DEMO_ENDPOINT=f"tcp://127.0.0.1:{free_port()}")
    result = subprocess.run(
        [sys.executable, str(REPO / "scripts" / "demo_run.py")], capture_output=True, text=True, timeout=180, env=env
    )
    assert result.returncode == 0, result.stdout + result.stderr
    out = result.stdout
    assert "configuration OK" in out
    assert "switching g15, g23, g31, g39, g47 to cross" in out  # the fewest resting gates on nominal tables
    assert "after calibration" in out
    assert "of the output light now leaves at mode 5" in out
    assert "exit code 1" in out  # the refused request while disarmed
    assert "daemon exited with code 0" in out
    assert "Traceback" not in result.stderr


def test_a_built_wheel_serves_the_demo_with_its_journal_in_the_user_folder(tmp_path: Path) -> None:
    """The wheel `pip install .` builds carries the demo configuration and its calibration; run
    from it (no source tree), `meshwarden serve` with no --config serves the demo, says so, and
    keeps the journal in $XDG_DATA_HOME/meshwarden; the license is an SPDX expression."""
    import zipfile

    from meshwarden.client import Client

    wheels = tmp_path / "wheels"
    built = subprocess.run(
        [sys.executable, "-m", "pip", "wheel", "--no-deps", "--quiet", "-w", str(wheels), str(REPO)],
        capture_output=True,
        text=True,
        timeout=600,
    )
    assert built.returncode == 0, built.stderr
    (wheel,) = wheels.glob("meshwarden-*.whl")
    site = tmp_path / "site"
    with zipfile.ZipFile(wheel) as archive:
        names = set(archive.namelist())
        archive.extractall(site)
        metadata = next(archive.read(n).decode() for n in names if n.endswith(".dist-info/METADATA"))
    assert {"meshwarden/demo_config/demo.yaml", "meshwarden/demo_config/demo/calibration/c00.yaml"} <= names
    assert "License-Expression: LicenseRef-Proprietary" in metadata
    port = free_port()
    endpoint, pub = f"tcp://127.0.0.1:{port}", f"tcp://127.0.0.1:{free_port()}"
    env = dict(os.environ, PYTHONPATH=str(site), XDG_DATA_HOME=str(tmp_path / "data"))
    log = tmp_path / "serve.log"
    with log.open("w") as out:
        proc = subprocess.Popen(
            [sys.executable, "-m", "meshwarden.cli", "serve", "--bind", endpoint, "--pub", pub],
            stdout=out,
            stderr=out,
            env=env,
            cwd=tmp_path,  # not the source tree
        )
    try:
        with Client(endpoint, pub) as mw:
            status = mw.wait_ready(60.0)
        assert sorted(status["boards"]) == ["b0", "b1"]
    finally:
        proc.send_signal(signal.SIGTERM)
        proc.wait(timeout=30)
    text = log.read_text()
    assert proc.returncode == 0, text
    assert "serving the DEMO on a simulated rack" in text and str(site / "meshwarden" / "demo_config") in text
    assert (tmp_path / "data" / "meshwarden" / "demo-journal.sqlite").exists()


def test_the_benchmark_script_starts() -> None:
    """scripts/bench.py builds its command line (its options parse, --help exits 0): the README's
    performance figures come from it."""
    result = subprocess.run(
        [sys.executable, str(REPO / "scripts" / "bench.py"), "--help"], capture_output=True, text=True, timeout=60
    )
    assert result.returncode == 0, result.stderr
    assert "--only" in result.stdout
