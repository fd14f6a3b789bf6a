"""The README's front door: scripts/demo runs the main job end to end on a fresh daemon."""

from __future__ import annotations

import os
import subprocess
import sys

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
    assert "switching g00, g08, g16, g24, g32 to cross" in out
    assert "of the output light now leaves at mode 5" in out
    assert "exit code 1" in out  # the refused request while disarmed
    assert "daemon exited with code 0" in out
    assert "Traceback" not in result.stderr
