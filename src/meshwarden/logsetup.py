"""Logging through structlog: readable on a terminal, JSON lines for a service journal.

Every log line that concerns a board or an actuator carries its id as a key (``board=``,
``actuator=``), bound with ``log.bind(...)``, so an engineer can grep one channel's history out
of weeks of daemon output.
"""

from __future__ import annotations

import logging
import sys
from typing import Literal, TextIO

import structlog

LogFormat = Literal["auto", "console", "json"]


def configure_logging(fmt: LogFormat = "auto", level: str = "info", stream: TextIO | None = None) -> None:
    """Set up structlog for this process; ``auto`` picks console on a terminal and JSON otherwise."""
    out = stream if stream is not None else sys.stderr
    if fmt == "auto":
        fmt = "console" if out.isatty() else "json"
    renderer: structlog.typing.Processor = (
        structlog.dev.ConsoleRenderer(colors=out.isatty()) if fmt == "console" else structlog.processors.JSONRenderer()
    )
    structlog.configure(
        processors=[
            structlog.contextvars.merge_contextvars,
            structlog.processors.add_log_level,
            structlog.processors.TimeStamper(fmt="iso", utc=True),
            structlog.processors.format_exc_info,
            renderer,
        ],
        wrapper_class=structlog.make_filtering_bound_logger(logging.getLevelNamesMapping()[level.upper()]),
        logger_factory=structlog.PrintLoggerFactory(file=out),
        cache_logger_on_first_use=False,
    )


def get_logger(**context: object) -> structlog.typing.FilteringBoundLogger:
    """A logger with ``context`` (board, actuator, job ...) bound to every line."""
    logger: structlog.typing.FilteringBoundLogger = structlog.get_logger().bind(**context)
    return logger
