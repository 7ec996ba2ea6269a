"""
sd_notify(3) without a dependency: one AF_UNIX datagram to ``$NOTIFY_SOCKET``.

systemd starts a ``Type=notify`` unit with ``NOTIFY_SOCKET`` set; the service reports ``READY=1``
when it is up, ``STATUS=...`` as a one-line summary for ``systemctl status``, ``EXTEND_TIMEOUT_USEC=...``
while a start takes longer than the unit's start timeout allows, and ``WATCHDOG=1`` keep-alives when
``WatchdogSec=`` is set (``$WATCHDOG_USEC``). Outside systemd the variable is
absent and every call is a no-op. Errors are swallowed: a missing notification socket must never
take the agent down.
"""

from __future__ import annotations

import os
import socket
from collections.abc import Mapping

import structlog

log = structlog.get_logger("listenpost.core.notify")


class Notifier:
    """Send sd_notify messages for the process that systemd started."""

    __slots__ = ("_address", "_watchdog_usec", "failures")

    def __init__(self, environ: Mapping[str, str] | None = None) -> None:
        env = os.environ if environ is None else environ
        raw = env.get("NOTIFY_SOCKET") or None
        if raw is not None and raw.startswith("@"):
            # sd_notify(3): a leading '@' names a socket in the abstract namespace (first byte NUL).
            raw = "\0" + raw[1:]
        elif raw is not None and not raw.startswith("/"):
            raw = None  # vsock:... and anything else are not AF_UNIX; not supported here
        self._address = raw
        self._watchdog_usec = _watchdog_usec(env)
        self.failures = 0
        """Datagrams that could not be sent (kept for the heartbeat; never raised)."""

    @property
    def enabled(self) -> bool:
        """True when running under systemd with a notification socket."""
        return self._address is not None

    @property
    def watchdog_interval(self) -> float | None:
        """Seconds between ``WATCHDOG=1`` pings: half of ``$WATCHDOG_USEC``, or ``None`` without a watchdog."""
        if self._watchdog_usec is None:
            return None
        return self._watchdog_usec / 2 / 1e6

    def notify(self, *fields: str) -> bool:
        """Send ``VAR=value`` lines as one datagram; True if it went out."""
        if self._address is None or not fields:
            return False
        payload = "\n".join(f.replace("\n", " ") for f in fields).encode()
        try:
            with socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM) as s:
                s.setblocking(False)
                s.connect(self._address)
                s.sendall(payload)
        except OSError as e:
            self.failures += 1
            log.debug("sd_notify_failed", error=str(e))
            return False
        return True

    def ready(self, status: str | None = None) -> bool:
        """Startup finished."""
        return self.notify("READY=1", *([f"STATUS={status}"] if status else []))

    def extend_timeout(self, seconds: float, status: str | None = None) -> bool:
        """Ask for ``seconds`` more before the current start (or stop) counts as hung; systemd 236 and
        later take it (``EXTEND_TIMEOUT_USEC``), older ones ignore it."""
        usec = max(1, round(seconds * 1e6))
        return self.notify(f"EXTEND_TIMEOUT_USEC={usec}", *([f"STATUS={status}"] if status else []))

    def status(self, text: str) -> bool:
        """One-line summary shown by ``systemctl status``."""
        return self.notify(f"STATUS={text}")

    def watchdog(self) -> bool:
        """Keep-alive; systemd restarts the unit if these stop for ``WatchdogSec``."""
        if self._watchdog_usec is None:
            return False
        return self.notify("WATCHDOG=1")

    def stopping(self) -> bool:
        """Shutdown has begun."""
        return self.notify("STOPPING=1")


def _watchdog_usec(env: Mapping[str, str]) -> int | None:
    raw = env.get("WATCHDOG_USEC")
    if not raw:
        return None
    try:
        usec = int(raw)
    except ValueError:
        return None
    pid = env.get("WATCHDOG_PID")
    # sd_watchdog_enabled(3): when WATCHDOG_PID is set, the watchdog is meant for that process only.
    if pid and pid.isdigit() and int(pid) != os.getpid():
        return None
    return usec if usec > 0 else None
