"""meshwarden: a control daemon for programmable photonic chips moved by electrostatic MEMS actuators.

Layers (dependencies point down only; see docs/architecture.md):
clients -> service (bus) -> jobs -> control (controller, guard, mapping, journal) -> drivers
-> protocol codec -> transport (pyserial URLs).
"""

__version__ = "0.1.0"
