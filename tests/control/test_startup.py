"""The adoption verdict at start (rule 5: a restart never jumps an output)."""

from __future__ import annotations

from meshwarden.drivers.base import BoardIdentity
from meshwarden.startup import BoardFound, adopt


def found(codes: tuple[int, ...], boot: int = 3, tripped: bool = False) -> BoardFound:
    identity = BoardIdentity("X", (1, 0, 0), len(codes), 0, 16, 16, 60.0, 2.5, 1, boot, ())
    return BoardFound(identity, codes, tripped)


def test_same_boot_same_codes_is_adopted() -> None:
    """Same boot counter and the journaled codes: adopted without a write."""
    assert adopt(found((5, 0, 7)), [5, 0, 7], 3).kind == "adopted"


def test_first_start_with_zeros_is_adopted() -> None:
    """A first start (no journal) with every output at zero is adopted."""
    verdict = adopt(found((0, 0, 0)), [0, 0, 0], None)
    assert (verdict.kind, verdict.needs_restore) == ("adopted", False)


def test_reset_board_waits_for_restore() -> None:
    """A changed boot counter means the board was reset: it waits for restore."""
    verdict = adopt(found((0, 0, 0), boot=4), [5, 0, 7], 3)
    assert (verdict.kind, verdict.needs_restore) == ("board_reset_detected", True)


def test_tripped_watchdog_waits_for_restore() -> None:
    """A board whose watchdog acted while we were away waits for restore."""
    verdict = adopt(found((0, 0, 0), tripped=True), [5, 0, 7], 3)
    assert (verdict.kind, verdict.needs_restore) == ("watchdog_tripped", True)


def test_other_codes_are_a_mismatch_naming_the_channels() -> None:
    """Codes other than the journal's are a mismatch naming the channels that differ."""
    verdict = adopt(found((5, 1, 7)), [5, 0, 6], 3)
    assert (verdict.kind, verdict.channels, verdict.needs_restore) == ("adoption_mismatch", (1, 2), True)
