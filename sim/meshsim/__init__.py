"""meshsim: a simulated driver rack and MEMS photonic chip that speaks the boards' byte protocol.

It stands on the other side of the cable: the daemon reaches it through a pty, a TCP socket or
an in-process pyserial URL and cannot tell it from real boards. Of meshwarden it imports only
the pure protocol codec (meshwarden.protocol).
"""

__version__ = "0.1.0"
