"""
structlog set-up for the agent and the collector: JSON lines off a terminal, console on one.

Libraries that log through the standard library (bleak, asyncio, aiohttp) go through the same
processors and renderer (structlog's ``ProcessorFormatter``), so a JSON stream holds one JSON object
per line whoever wrote it. Under systemd, each line starts with its syslog priority (``<4>`` for a
warning), which journald strips and files the line under (sd-daemon(3), "SyslogLevelPrefix=").
"""

from __future__ import annotations

import logging
import os
import sys
from collections.abc import Callable, MutableMapping
from typing import Any, Literal

import structlog

LogFormat = Literal["auto", "json", "console"]

# sd-daemon(3): SD_CRIT "<2>", SD_ERR "<3>", SD_WARNING "<4>", SD_INFO "<6>", SD_DEBUG "<7>".
PRIORITIES = {"critical": 2, "exception": 3, "error": 3, "warning": 4, "warn": 4, "info": 6, "debug": 7}

_HANDLER_MARK = "_listenpost_handler"


def journal_stream(stream: Any) -> bool:
    """
    True when ``stream`` is the journald stream systemd connected (``$JOURNAL_STREAM`` holds its
    ``device:inode``, to compare with the file descriptor's, as systemd.exec(5) describes).
    """
    want = os.environ.get("JOURNAL_STREAM", "")
    dev, _, ino = want.partition(":")
    try:
        st = os.fstat(stream.fileno())
    except (AttributeError, OSError, ValueError):
        return False
    return bool(want) and f"{st.st_dev}:{st.st_ino}" == f"{dev}:{ino}"


def _with_priority(render: Callable[..., Any]) -> Callable[..., str]:
    """Wrap a renderer so its line starts with the ``<N>`` syslog priority of the entry's level."""

    def wrapped(logger: Any, name: str, event_dict: MutableMapping[str, Any]) -> str:
        level = str(event_dict.get("level", name)).lower()
        return f"<{PRIORITIES.get(level, 6)}>{render(logger, name, event_dict)}"

    return wrapped


class _Handler(logging.StreamHandler):  # type: ignore[type-arg]
    """The root handler; a stream closed under it (a demo's log file after the run) drops records."""

    def emit(self, record: logging.LogRecord) -> None:
        if not getattr(self.stream, "closed", False):
            super().emit(record)


def configure(
    fmt: LogFormat = "auto",
    level: str = "info",
    stream: Any = None,
    *,
    journal: bool | None = None,
    **bound: Any,
) -> None:
    """
    Configure structlog and the standard library's root logger once per process.

    Args:
        fmt: ``json`` for journald and files, ``console`` for people, ``auto`` picks by ``isatty``.
        level: minimum level name.
        stream: where to write (default ``sys.stderr``; stdout is reserved for command output).
        journal: prefix each line with its syslog priority; None: when ``stream`` is systemd's journal stream.
        bound: context bound on every line (the agent binds ``board``).
    """
    out = stream or sys.stderr
    if fmt == "auto":
        fmt = "console" if getattr(out, "isatty", lambda: False)() else "json"
    if journal is None:
        journal = journal_stream(out)
    renderer: Any = (
        structlog.processors.JSONRenderer() if fmt == "json" else structlog.dev.ConsoleRenderer(colors=False)
    )
    if journal:
        renderer = _with_priority(renderer)
    threshold = logging.getLevelNamesMapping()[level.upper()]
    shared: list[Any] = [
        structlog.contextvars.merge_contextvars,
        structlog.processors.add_log_level,
        structlog.processors.TimeStamper(fmt="iso", utc=True),
    ]
    structlog.configure(
        processors=[*shared, structlog.processors.format_exc_info, renderer],
        wrapper_class=structlog.make_filtering_bound_logger(threshold),
        logger_factory=structlog.PrintLoggerFactory(out),
        cache_logger_on_first_use=False,
    )
    # The standard library's records: same context, level and time stamp, plus the logger's name,
    # rendered by the same renderer (structlog docs, "Rendering Using structlog-based Formatters
    # Within logging").
    formatter = structlog.stdlib.ProcessorFormatter(
        foreign_pre_chain=[*shared, structlog.stdlib.add_logger_name],
        processors=[
            structlog.stdlib.ProcessorFormatter.remove_processors_meta,
            structlog.processors.format_exc_info,
            renderer,
        ],
    )
    handler = _Handler(out)
    handler.setFormatter(formatter)
    setattr(handler, _HANDLER_MARK, True)
    root = logging.getLogger()
    for old in [h for h in root.handlers if getattr(h, _HANDLER_MARK, False)]:
        root.removeHandler(old)
    root.addHandler(handler)
    root.setLevel(threshold)
    structlog.contextvars.clear_contextvars()
    if bound:
        structlog.contextvars.bind_contextvars(**bound)
