"""Reading SCPI text against the standards' own forms: IEEE 488.2 response data and *IDN?,
SCPI 1999 error queue entries and error classes."""

from __future__ import annotations

import pytest

from meshwarden.drivers.scpi_text import (
    error_class,
    nak_reason,
    parse_error,
    parse_idn,
    parse_integer,
    parse_number,
    split_units,
)
from meshwarden.errors import ProtocolError
from meshwarden.protocol.messages import NakReason


def test_idn_has_four_comma_separated_fields() -> None:
    """An *IDN? response is manufacturer, model, serial number, firmware level; 0 where a field
    is not reported."""
    # Source: IEEE 488.2-1992 section 10.14 (*IDN? response: four fields separated by commas,
    # the serial and firmware fields 0 when not available) - the 0 convention from memory.
    idn = parse_idn("ACME-LABS,HVS-32,0,0\n")
    assert (idn.manufacturer, idn.model, idn.serial, idn.firmware) == ("ACME-LABS", "HVS-32", "0", "0")
    assert idn.serial_number() == 0 and idn.firmware_version() == (0, 0, 0)
    idn = parse_idn("ACME-LABS,HVS-32,SN0042A,2.13-rev7")
    assert idn.firmware_version() == (2, 13, 7)
    assert idn.serial_number() == parse_idn("X,Y,SN0042A,1").serial_number()  # stable, not per run


@pytest.mark.parametrize("text", ["ACME,HVS-32,1", "ACME,HVS-32,1,2,3", ",HVS,1,2", ""])
def test_idn_with_other_than_four_fields_is_refused(text: str) -> None:
    """A response without exactly four fields (or without a manufacturer) is not an identity."""
    with pytest.raises(ProtocolError, match="four comma-separated fields"):
        parse_idn(text)


def test_error_queue_entries() -> None:
    """SYSTem:ERRor? answers <number>,"<text>"; 0 means the queue is empty."""
    # Source: SCPI 1999 Vol. 2 ch. 21.8 (SYSTem:ERRor[:NEXT]? returns an NR1 and a string;
    # 0,"No error" when the queue is empty; -222 "Data out of range"; -350 "Queue overflow"),
    # as instrument manuals quoting it give them.
    empty = parse_error('0,"No error"')
    assert not empty.is_error and empty.text == "No error"
    assert parse_error('+0,"No error"').number == 0
    entry = parse_error('-222,"Data out of range"')
    assert (entry.number, entry.text, entry.is_error) == (-222, "Data out of range", True)
    assert parse_error('-350,"Queue overflow"').number == -350
    # A quote inside string response data is doubled (IEEE 488.2 section 8.7.8, from memory).
    assert parse_error('-241,"Hardware missing;""Attenuator"""').text == 'Hardware missing;"Attenuator"'


@pytest.mark.parametrize("text", ["-222,Data out of range", "-222", 'x,"No error"', '"No error"'])
def test_malformed_error_entries_are_refused(text: str) -> None:
    """An entry without its number or its quoted text cannot be read."""
    with pytest.raises(ProtocolError, match="not an error queue entry"):
        parse_error(text)


@pytest.mark.parametrize(
    ("number", "kind"),
    [
        # Source: SCPI 1999 Vol. 2 ch. 21 - command errors -100..-199, execution errors
        # -200..-299, device-specific errors -300..-399, query errors -400..-499; positive
        # numbers are the instrument's own.
        (0, "no error"),
        (-100, "command"),
        (-113, "command"),
        (-199, "command"),
        (-200, "execution"),
        (-222, "execution"),
        (-299, "execution"),
        (-300, "device-specific"),
        (-350, "device-specific"),
        (-410, "query"),
        (-500, "power on"),  # -5xx power on, -6xx user request, -7xx request control (from memory)
        (-600, "user request"),
        (-800, "operation complete"),
        (102, "device-specific"),
    ],
)
def test_error_classes_follow_the_standard_ranges(number: int, kind: str) -> None:
    """Each error number falls in the class of its hundred."""
    assert error_class(number) == kind


def test_errors_become_board_refusals() -> None:
    """Out-of-range data is a bad value, a missing channel a bad channel, a parse error an unknown
    command, a device error an output fault."""
    assert nak_reason(-222) == NakReason.BAD_VALUE
    assert nak_reason(-224) == NakReason.BAD_VALUE
    assert nak_reason(-114) == NakReason.BAD_CHANNEL
    assert nak_reason(-113) == NakReason.UNKNOWN_COMMAND
    assert nak_reason(-221) == NakReason.BAD_VALUE
    assert nak_reason(-350) == NakReason.OUTPUT_FAULT
    assert nak_reason(101) == NakReason.OUTPUT_FAULT


def test_numeric_response_data() -> None:
    """NR1, NR2 and NR3 forms are read; SCPI's overrange and not-a-number values are refused."""
    # Source: IEEE 488.2-1992 section 8.7.2-8.7.4 (NR1 integer, NR2 fixed point, NR3 with exponent).
    assert parse_number("+12") == 12.0
    assert parse_number("-0.001500") == -0.0015
    assert parse_number("1.5E+01") == 15.0
    assert parse_number(".5") == 0.5
    assert parse_integer("+0") == 0 and parse_integer("-350") == -350
    # SCPI 1999 Vol. 1 section 7.2.1.5: 9.9E37 means overrange/infinity, 9.91E37 not-a-number (from memory).
    with pytest.raises(ProtocolError, match="overrange"):
        parse_number("9.9E37")
    with pytest.raises(ProtocolError, match="not a number"):
        parse_number("9.91E+37")
    for bad in ("", "1.2.3", "12V", "nan", "inf"):
        with pytest.raises(ProtocolError):
            parse_number(bad)
    with pytest.raises(ProtocolError):
        parse_integer("1.0")


def test_response_units_split_on_semicolons_outside_strings() -> None:
    """A response message to several queries carries one unit per query separated by ';'."""
    # Source: IEEE 488.2-1992 section 8.4.1 (response message unit separator ';'), from memory.
    assert split_units('1.500000;1;-222,"Data out of range"', 3) == ["1.500000", "1", '-222,"Data out of range"']
    assert split_units('0,"No error; really"', 1) == ['0,"No error; really"']
    with pytest.raises(ProtocolError, match="expected 2 response unit"):
        split_units("1.5", 2)
    with pytest.raises(ProtocolError, match="unterminated string"):
        split_units('0,"No error', 1)
