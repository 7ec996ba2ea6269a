"""structlog set-up for the agent and the collector: JSON lines off a terminal, console on one."""

from __future__ import annotations

import logging
import sys
from typing import Any, Literal

import structlog

LogFormat = Literal["auto", "json", "console"]


def configure(fmt: LogFormat = "auto", level: str = "info", stream: Any = None, **bound: Any) -> None:
    """
    Configure structlog once per process.

    Args:
        fmt: ``json`` for journald and files, ``console`` for people, ``auto`` picks by ``isatty``.
        level: minimum level name.
        stream: where to write (default ``sys.stderr``; stdout is reserved for command output).
        bound: context bound on every line (the agent binds ``board``).
    """
    out = stream or sys.stderr
    if fmt == "auto":
        fmt = "console" if getattr(out, "isatty", lambda: False)() else "json"
    renderer: Any = (
        structlog.processors.JSONRenderer() if fmt == "json" else structlog.dev.ConsoleRenderer(colors=False)
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
        logger_factory=structlog.PrintLoggerFactory(out),
        cache_logger_on_first_use=False,
    )
    structlog.contextvars.clear_contextvars()
    if bound:
        structlog.contextvars.bind_contextvars(**bound)
