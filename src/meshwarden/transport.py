"""Opening a board's link from its URL with pyserial, and nothing else.

Every board is opened with ``serial.serial_for_url(url)``: a device path, ``socket://host:port``
or any scheme a package registers under the ``meshwarden.serial_url_handlers`` entry point (the
simulator registers ``meshsim://`` this way; the daemon itself never imports it). Real ports are
opened exclusively (``exclusive=True``) so two processes can never drive one rack, with read
and write timeouts, and with DTR/RTS left asserted as the operating system raised them on open
(pyserial's default), never pulsed: some boards reset on a DTR edge. The line speed is the
board's ``baud_rate`` (socket and simulator links ignore it).
"""

from __future__ import annotations

from importlib.metadata import entry_points

import serial

ENTRY_POINT_GROUP = "meshwarden.serial_url_handlers"
_registered = False


def register_url_handlers() -> None:
    """Add every installed URL handler package to pyserial's search list (once)."""
    global _registered
    if _registered:
        return
    for entry in entry_points(group=ENTRY_POINT_GROUP):
        if entry.value not in serial.protocol_handler_packages:
            serial.protocol_handler_packages.append(entry.value)
    _registered = True


def open_port(url: str, timeout_s: float, write_timeout_s: float = 1.0, baud_rate: int = 115200) -> serial.SerialBase:
    """Open the link to a board; raises ``serial.SerialException`` (or OSError) when it cannot."""
    register_url_handlers()
    port = serial.serial_for_url(
        url, do_not_open=True, timeout=timeout_s, write_timeout=write_timeout_s, baudrate=baud_rate
    )
    if not url.startswith(("socket://", "meshsim://", "loop://")):
        port.exclusive = True
    port.dsrdtr = False
    port.rtscts = False
    port.open()
    return port
