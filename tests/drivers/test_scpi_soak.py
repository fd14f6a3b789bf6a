"""The soak harness on SCPI boards, short: random operations, link-fault bursts, board resets and
kill -9 restarts of the daemon, with every write the boards received checked against the rules."""

from __future__ import annotations

import pytest

from tests.control.test_soak import _soak_module


@pytest.mark.slow
def test_a_short_scpi_soak_breaks_no_rule_at_the_boards() -> None:
    """Six random sequences on the scpi driver and the SCPI personality, two restarts mid-ramp:
    writes were checked and none broke a rule."""
    result = _soak_module().run_soak(sequences=6, seed=11, restart_every=3, driver="scpi")
    assert result["writes_checked"] > 50
    assert result["restarts"] >= 2
    assert result["violations"] == 0, result["first_violations"]
