"""A one-line progress bar for ramps and sweeps on a terminal; silent when output is not a terminal.

Hand-written on purpose: the project's runtime dependencies are a fixed short list, and a bar
that rewrites one line with a carriage return needs nothing more.
"""

from __future__ import annotations

import sys
import time
from typing import TextIO


class Progress:
    """``update(done, total)`` redraws ``label [#####.....]  45%  9/20  ETA 3 s`` in place."""

    WIDTH = 30

    def __init__(self, label: str, stream: TextIO | None = None) -> None:
        self.label = label
        self.stream = stream or sys.stderr
        self.enabled = bool(getattr(self.stream, "isatty", lambda: False)())
        self.started = time.monotonic()
        self._drawn = False

    def update(self, done: int, total: int) -> None:
        if not self.enabled or total <= 0:
            return
        fraction = min(max(done / total, 0.0), 1.0)
        filled = round(self.WIDTH * fraction)
        elapsed = time.monotonic() - self.started
        eta = f"ETA {elapsed * (1 - fraction) / fraction:.0f} s" if 0 < fraction < 1 else ""
        bar = "#" * filled + "." * (self.WIDTH - filled)
        self.stream.write(f"\r{self.label} [{bar}] {fraction:4.0%}  {done}/{total}  {eta:<12}")
        self.stream.flush()
        self._drawn = True

    def close(self) -> None:
        """End the line the bar was drawn on (if it was)."""
        if self._drawn:
            self.stream.write("\n")
            self.stream.flush()
            self._drawn = False
