"""
Errors the agent raises on purpose.

    ListenpostError
     ├── ConfigError            bad config file or value (exit code 2)
     ├── DecodeError            bytes that are not what their format says (parsers' documented error)
     │    └── CaptureFormatError  a recording or capture file that cannot be read (names file and line)
     ├── SourceUnavailable      the radio cannot be used now; .reason says why
     ├── SpoolError             the on-board spool cannot be used
     └── UplinkError            talking to the collector failed
          ├── CollectorUnreachable  network error, timeout, 5xx, 429: retry with backoff
          └── BatchRejected          the collector said no (4xx); .status carries the code
"""

from __future__ import annotations

import enum


class ListenpostError(Exception):
    """Base of every error listenpost raises on purpose."""


class ConfigError(ListenpostError):
    """A config file or value is invalid; the message names the file, the key path and the problem."""


class DecodeError(ListenpostError, ValueError):
    """Bytes that do not follow their format."""


class CaptureFormatError(DecodeError):
    """A recording or capture file cannot be read; the message names the file and the line or record."""


class SourceReason(enum.Enum):
    """Why a radio source is unavailable."""

    NO_BLUETOOTH = "no_bluetooth"
    """No adapter, no D-Bus socket, or no AF_BLUETOOTH in this Python."""
    POWERED_OFF = "powered_off"
    """Adapter present but powered off or rfkill-blocked."""
    DENIED = "denied"
    """Permission denied (D-Bus policy, missing CAP_NET_RAW)."""
    BLUEZ_DOWN = "bluez_down"
    """The system bus answers but bluetoothd does not."""
    ADAPTER_MISSING = "adapter_missing"
    """The configured adapter does not exist."""
    STALLED = "stalled"
    """The scanner ran but delivered nothing for longer than expected."""
    OTHER = "other"
    """Anything else; the message says what."""


class SourceUnavailable(ListenpostError):
    """The radio cannot be used now."""

    def __init__(self, reason: SourceReason, message: str) -> None:
        super().__init__(message)
        self.reason = reason


class SpoolError(ListenpostError):
    """The on-board spool cannot be opened or written."""


class UplinkError(ListenpostError):
    """Talking to the collector failed."""


class CollectorUnreachable(UplinkError):
    """Network error, timeout, 5xx or 429: worth retrying later."""

    def __init__(self, message: str, retry_after: float | None = None) -> None:
        super().__init__(message)
        self.retry_after = retry_after


class BatchRejected(UplinkError):
    """The collector answered a 4xx other than 429."""

    def __init__(self, status: int, message: str) -> None:
        super().__init__(f"collector answered {status}: {message}")
        self.status = status
