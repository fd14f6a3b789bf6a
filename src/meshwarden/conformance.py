"""A conformance suite for board drivers, run against real hardware, an emulator or the simulator.

A driver author points it at one board of a configuration (and, if the configured URL is not
the one to use, at a port URL), as pyserial's own tests take a port URL::

    from meshwarden.config import load_config
    from meshwarden.conformance import run_conformance

    report = run_conformance(load_config("lab.yaml").rack.board("b0"), url="/dev/ttyUSB0")
    print(report.text())
    assert report.ok

or from a shell: ``python -m meshwarden.conformance lab.yaml b0 [--url URL]``.

Every check drives the board through the public :class:`~meshwarden.drivers.base.BoardDriver`
methods, so it tests the driver's hooks and the board together. Writes stay at or below
``max_test_volts`` (1 V by default) on the first outputs: still, run it with the chip
disconnected or with outputs that may safely move. The checks of link loss and of an emergency
abort during retries need a way to silence the link for a while (:class:`LinkControl`); on a
real bench that is a person pulling a cable, so without one they are reported as skipped.
"""

from __future__ import annotations

import argparse
import dataclasses
import sys
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field

from meshwarden.config.model import BoardConfig
from meshwarden.drivers.base import BoardDriver
from meshwarden.drivers.registry import create_driver
from meshwarden.errors import LimitRefused, LinkError, MeshwardenError, RefusedError

SETTLE_S = 0.2  # a board is deaf while it boots; give it this long after a reset


class ConformanceFailure(AssertionError):
    """A check found the driver or the board not doing what the contract says."""


@dataclass(frozen=True)
class LinkControl:
    """How the suite may act on the bench: ``silence(seconds)`` makes the board's link carry
    nothing for that long (starting now) and returns at once; ``set_interlock(is_open)``, if
    given, opens or closes the board's interlock contact (on a real bench: a person at the door)."""

    silence: Callable[[float], None]
    set_interlock: Callable[[bool], None] | None = None


@dataclass
class ConformanceReport:
    """Each check's verdict, in the order run: ``passed``, ``skipped: why`` or ``failed: why``."""

    board: str
    results: dict[str, str] = field(default_factory=dict)

    @property
    def ok(self) -> bool:
        return not any(v.startswith("failed") for v in self.results.values())

    def failures(self) -> dict[str, str]:
        return {k: v for k, v in self.results.items() if v.startswith("failed")}

    def text(self) -> str:
        width = max((len(k) for k in self.results), default=0)
        lines = [f"conformance of board {self.board}:"]
        lines += [f"  {name:<{width}}  {verdict}" for name, verdict in self.results.items()]
        return "\n".join(lines)


def _expect(condition: bool, message: str) -> None:
    if not condition:
        raise ConformanceFailure(message)


class _Suite:
    def __init__(self, driver: BoardDriver, max_test_volts: float, link: LinkControl | None) -> None:
        self.d = driver
        self.c = driver.config
        self.link = link
        lsb = self.c.full_scale_volts / (1 << self.c.dac_bits)
        self.top = max(1, min(driver.max_code, int(max_test_volts / lsb)))
        self.n = min(4, self.c.outputs)
        ceiling = [0] * self.c.outputs
        for ch in range(self.n):
            ceiling[ch] = self.top
        driver.set_ceiling(tuple(ceiling))

    def codes(self, scale: float) -> tuple[int, ...]:
        return tuple(max(1, round(self.top * scale * (k + 1) / self.n)) for k in range(self.n))

    # ------------------------------------------------------------------ checks, in order

    def identify(self) -> None:
        """The board is the one the configuration describes."""
        i = self.d.identify()
        found = (i.outputs, i.monitor_inputs, i.dac_bits, round(i.full_scale_volts, 3))
        expected = (self.c.outputs, self.c.monitor_inputs, self.c.dac_bits, round(self.c.full_scale_volts, 3))
        _expect(found == expected, f"identify reports outputs/inputs/bits/full scale {found}, config {expected}")
        beat = self.d.heartbeat()
        _expect(beat.boot_count == i.boot_count, f"boot counter {i.boot_count} at identify, {beat.boot_count} after")

    def write_and_read_back(self) -> None:
        """Written codes are latched, read back equal, and the driver's record has no doubt."""
        self.d.clear_faults()
        for scale in (0.5, 1.0, 0.25):
            codes = self.codes(scale)
            _expect(self.d.write_codes(0, codes) == codes, f"write of {codes} not acknowledged as latched")
            _expect(self.d.read_codes(0, self.n) == codes, f"read back differs from {codes}")
        whole = self.d.read_codes(0, self.c.outputs)
        seen, doubt = self.d.outputs_seen()
        _expect(doubt is None and seen == whole, f"record of codes seen {seen[: self.n]} (doubt {doubt})")

    def range_refusals(self) -> None:
        """Out-of-range channels, codes and codes above the ceiling are refused; nothing changes."""
        before = self.d.read_codes(0, self.c.outputs)
        attempts: list[tuple[str, Callable[[], object], type[Exception]]] = [
            ("a channel past the last", lambda: self.d.write_codes(self.c.outputs - 1, (1, 1)), MeshwardenError),
            ("a code past the DAC", lambda: self.d.write_codes(0, (self.d.max_code + 1,)), MeshwardenError),
            ("a code above the ceiling", lambda: self.d.write_codes(0, (self.top + 1,)), LimitRefused),
            ("an unwired output raised", lambda: self.d.write_codes(self.c.outputs - 1, (1,)), LimitRefused),
        ]
        if self.c.outputs <= self.n:
            attempts.pop()  # every output is a test output
        for what, attempt, error in attempts:
            try:
                attempt()
            except error:
                pass
            else:
                raise ConformanceFailure(f"{what} was not refused")
        _expect(self.d.read_codes(0, self.c.outputs) == before, "a refused write changed the outputs")

    def zero_all(self) -> None:
        """Zero all brings every output to code 0, confirmed by reading them."""
        self.d.write_codes(0, self.codes(0.5))
        self.d.zero_all()
        _expect(self.d.read_codes(0, self.c.outputs) == (0,) * self.c.outputs, "outputs not at 0 after zero all")
        _expect(self.d.outputs_seen() == ((0,) * self.c.outputs, None), "the record does not show every output at 0")

    def watchdog_configuration(self) -> None:
        """The configured watchdog is accepted and is not tripped by a live link."""
        self.d.configure_watchdog(self.c.watchdog.timeout_s, self.c.watchdog.action)
        self.d.heartbeat()
        _expect(not self.d.status().watchdog_tripped, "watchdog reports tripped right after configuration")

    def monitor_reads(self) -> None:
        """Every monitor input reads a count within the ADC range, at every configured gain."""
        if not self.c.monitor_inputs:
            return
        top = (1 << self.c.adc_bits) - 1
        for gain in range(len(self.c.monitor_gains_ohms)):
            try:
                self.d.set_monitor_gains(0, (gain,) * self.c.monitor_inputs)
            except MeshwardenError as exc:
                _expect(gain > 0, f"the first gain cannot be selected: {exc}")
                break
            counts = self.d.read_monitor_counts(0, self.c.monitor_inputs, 1e-3)
            _expect(len(counts) == self.c.monitor_inputs, f"{len(counts)} counts for {self.c.monitor_inputs} inputs")
            _expect(all(0 <= c <= top for c in counts), f"counts outside 0..{top}: {counts}")
        self.d.set_monitor_gains(0, (0,) * self.c.monitor_inputs)

    def status_and_interlock(self) -> None:
        """Status agrees with the heartbeat; a configured interlock reads closed on a quiet bench."""
        beat = self.d.heartbeat()
        status = self.d.status()
        _expect(status.boot_count == beat.boot_count, f"status boot {status.boot_count}, heartbeat {beat.boot_count}")
        if self.c.interlock:
            _expect(not self.d.interlock_open(), "the interlock reads open (close it to run the suite)")

    def link_loss_and_reconnect(self) -> None:
        """While the link is silent calls fail with a LinkError and a write leaves the outputs in
        doubt; when it returns, a full read ends the doubt."""
        assert self.link is not None
        self.d.recover()
        self.link.silence(self._silence_s())
        try:
            self.d.write_codes(0, self.codes(0.5))
        except LinkError:
            pass
        else:
            raise ConformanceFailure("a write over a silent link was acknowledged")
        _expect(self.d.outputs_seen()[1] is not None, "a write that failed left no doubt")
        self._wait_for_link()
        whole = self.d.read_codes(0, self.c.outputs)
        _expect(self.d.outputs_seen() == (whole, None), "a full read after the link returned left doubt")
        self.d.recover()

    def estop_abort_during_retries(self) -> None:
        """An emergency abort makes a write that is retrying over a silent link give up before its
        retries are spent; an emergency zero afterwards is not given up."""
        assert self.link is not None
        self.d.recover()
        retries = self.c.retries
        self.link.silence(self._silence_s())
        outcome: list[BaseException | None] = []

        def write() -> None:
            try:
                self.d.write_codes(0, self.codes(0.5))
                outcome.append(None)
            except BaseException as exc:  # judged below
                outcome.append(exc)

        worker = threading.Thread(target=write, name="conformance-write")
        failures_before = self._failures()
        worker.start()
        while self._failures() == failures_before and worker.is_alive():
            time.sleep(0.005)  # wait until the first attempt has failed: the write is retrying
        self.d.abort.set()
        worker.join(timeout=max(30.0, 4 * (retries + 1) * self.c.timeout_s))
        self.d.abort.clear()
        _expect(not worker.is_alive(), "the write did not return after the abort")
        _expect(bool(outcome) and isinstance(outcome[0], LinkError), f"the write ended with {outcome!r}")
        failed = self._failures() - failures_before
        _expect(failed < retries + 1, f"{failed} attempts were made: the abort did not end the retries")
        self._wait_for_link()
        self.d.emergency_zero()
        _expect(self.d.read_codes(0, self.c.outputs) == (0,) * self.c.outputs, "outputs not at 0 after the estop")
        self.d.recover()

    def interlock_reads_open_and_closed(self) -> None:
        """The board's interlock reads open while its contact is open and closed again after."""
        assert self.link is not None and self.link.set_interlock is not None
        self.link.set_interlock(True)
        try:
            _expect(self.d.interlock_open(), "the interlock reads closed with its contact open")
        finally:
            self.link.set_interlock(False)
        _expect(not self.d.interlock_open(), "the interlock reads open after its contact closed")

    def reset_or_refusal(self) -> None:
        """A reset either restarts the board (boot counter + 1, outputs 0, power-on flag) or is
        refused with nothing changed."""
        self.d.clear_faults()
        self.d.write_codes(0, self.codes(0.5))
        boot = self.d.heartbeat().boot_count
        try:
            self.d.reset()
        except RefusedError:
            _expect(self.d.read_codes(0, self.n) == self.codes(0.5), "a refused reset changed the outputs")
            self.d.zero_all()
            return
        time.sleep(SETTLE_S)
        _expect(self.d.heartbeat().boot_count == boot + 1, "the boot counter did not move on after a reset")
        _expect(self.d.read_codes(0, self.c.outputs) == (0,) * self.c.outputs, "outputs not at 0 after a reset")
        _expect(self.d.status().power_on, "no power-on flag after a reset")
        self.d.clear_faults()

    # ------------------------------------------------------------------ helpers

    def _silence_s(self) -> float:
        return (self.c.retries + 2) * self.c.timeout_s * 2 + 0.5

    def _failures(self) -> int:
        return self.d._attempts.count(False)

    def _wait_for_link(self) -> None:
        deadline = time.monotonic() + self._silence_s() + 30.0
        while True:
            try:
                self.d.heartbeat()
                return
            except LinkError:
                if time.monotonic() > deadline:
                    raise ConformanceFailure("the link did not come back") from None


CHECKS = (
    "identify",
    "write_and_read_back",
    "range_refusals",
    "zero_all",
    "watchdog_configuration",
    "monitor_reads",
    "status_and_interlock",
    "interlock_reads_open_and_closed",
    "reset_or_refusal",
    "link_loss_and_reconnect",
    "estop_abort_during_retries",
)
NEEDS_LINK = ("link_loss_and_reconnect", "estop_abort_during_retries")


def run_conformance(
    board: BoardConfig,
    *,
    url: str | None = None,
    link: LinkControl | None = None,
    max_test_volts: float = 1.0,
    driver: BoardDriver | None = None,
) -> ConformanceReport:
    """Run every check against ``board`` (reached at ``url`` if given) with its configured
    driver (or ``driver``); the outputs are zeroed and the link closed at the end."""
    if url is not None:
        board = dataclasses.replace(board, url=url)
    report = ConformanceReport(board.id)
    try:
        d = driver or create_driver(board)
        d.open()
    except MeshwardenError as exc:
        report.results["open"] = f"failed: {exc}"
        return report
    try:
        suite = _Suite(d, max_test_volts, link)
        for name in CHECKS:
            if name in NEEDS_LINK and link is None:
                report.results[name] = "skipped: no LinkControl to silence the link"
                continue
            if name == "interlock_reads_open_and_closed" and not (board.interlock and link and link.set_interlock):
                why = "the board has no watched interlock" if not board.interlock else "nothing to open it"
                report.results[name] = f"skipped: {why}"
                continue
            try:
                getattr(suite, name)()
                report.results[name] = "passed"
            except (ConformanceFailure, MeshwardenError) as exc:
                report.results[name] = f"failed: {exc}"
                d.abort.clear()
                d.recover()
        try:
            d.emergency_zero()  # leave the board at zero whatever happened, faulted or not
        except MeshwardenError as exc:
            report.results["final_zero"] = f"failed: {exc}"
    finally:
        d.close()
    return report


def main(argv: list[str] | None = None) -> int:
    """``python -m meshwarden.conformance CONFIG BOARD [--url URL] [--max-test-volts V]``."""
    from meshwarden.config import load_config

    parser = argparse.ArgumentParser(prog="python -m meshwarden.conformance", description=main.__doc__)
    parser.add_argument("config")
    parser.add_argument("board")
    parser.add_argument("--url", default=None, help="the port to use instead of the configured url")
    parser.add_argument("--max-test-volts", type=float, default=1.0)
    args = parser.parse_args(argv)
    try:
        config = load_config(args.config)
        board = config.rack.board(args.board)
    except KeyError:
        print(f"error: no board {args.board!r} in {args.config}", file=sys.stderr)
        return 2
    except MeshwardenError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    report = run_conformance(board, url=args.url, max_test_volts=args.max_test_volts)
    print(report.text())
    return 0 if report.ok else 1


if __name__ == "__main__":
    sys.exit(main())
