"""meshwarden.testing: the recording board and the daemon-in-a-thread that users' tests import."""

from __future__ import annotations

import itertools
from pathlib import Path

from meshwarden.client import Client
from meshwarden.config import load_config
from meshwarden.testing import RecordingDriver, running_daemon
from tests.config.minimal import MAIN, replace_line, write_config


def test_recording_board_behind_the_real_daemon(tmp_path: Path) -> None:
    """A configuration with `driver: recording` runs the real controller, guard and bus; the
    recording board keeps every write, each within the step limit."""
    text = replace_line("      url: socket://127.0.0.1:9", "      url: none://\n      driver: recording", MAIN)
    config = load_config(write_config(tmp_path, text))
    with running_daemon(config) as (endpoint, telemetry), Client(endpoint, telemetry) as mw:
        mw.arm()
        mw.set({"c0": 10.0}, volts=True)
        assert mw.get()["actuators"]["c0"]["code"] > 0
        mw.estop("done")
    board = RecordingDriver.boards["b0"]
    assert board.codes[0] == 0
    codes = [0] + [w[2][0] for w in board.writes]
    assert max(abs(b - a) for a, b in itertools.pairwise(codes)) * 60 / 65536 <= 2.0 + 1e-9
    assert codes[-1] == round(10.0 * 65536 / 60)
