"""
The spool's values: what it hands out (`SealedBatch`, `SpoolStats`, `GapReason`), what the worker
thread hands back to the event loop, seq-interval arithmetic for gap records, and its bounds.
"""

from __future__ import annotations

import enum
import gzip
import secrets
import zlib
from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

from listenpost.core.wire import canonical_json, digest

SCHEMA_VERSION = 1
ROW_OVERHEAD_BYTES = 160
"""Per-row bytes counted on top of the compressed body (key, digest, index entry), an estimate."""
DROP_SLACK = 0.10
"""On overflow, free this fraction of ``max_bytes`` beyond what the new batch needs, so drops (and
their gap records) come in a few large steps rather than one per seal."""
DEAD_LETTER_KEEP = 32
"""Dead-lettered batches kept for inspection; older ones are deleted (they stay counted)."""
GZIP_LEVEL = 6
RETRY_MAX_SECONDS = 60.0
"""Cap of the doubling retry interval while the storage is failing."""
QUICK_CHECK_BUDGET = 200_000
"""Progress-handler calls (of 1000 SQLite VM steps each) the open-time check may take before it is
cut short; bounds start-up on a large spool and a slow card."""
SALVAGE_MAX_ROWS = 1_000_000
BUSY_TIMEOUT_S = 1.0
"""How long a statement waits for another connection's lock, seconds (on the worker thread)."""

BODY_ERRORS = (OSError, EOFError, ValueError, zlib.error)
"""What a damaged gzip body raises on the way to its JSON (gzip.BadGzipFile is an OSError)."""

COUNTERS = ("dropped_batches", "dropped_readings", "dead_letters", "corrupt_set_aside")


class GapReason(enum.Enum):
    """Why a gap record was sealed (the wire's ``gap.reason``)."""

    SPOOL_FULL = "spool_full"
    """The byte bound was reached; the oldest sealed batches were dropped."""
    SPOOL_CORRUPT = "spool_corrupt"
    """The spool file (or one row of it) was damaged; what could not be read is lost."""
    DEAD_LETTER = "dead_letter"
    """The collector refused the batch (400/413); it was moved aside."""


@dataclass(frozen=True, slots=True)
class SealedBatch:
    """One sealed batch as the uplink sends it."""

    epoch: str
    """Spool epoch of the key, 16 lower-case hex."""
    seq: int
    """Sequence number within the epoch, from 0."""
    digest: str
    """sha256 hex of ``content``."""
    content: bytes
    """The canonical JSON of ``listenpost.core.wire.encode_content`` (gap records included), made once at
    seal time: the very bytes that were digested and that the uplink sends."""
    n_readings: int
    """Readings in the batch (0 for a gap record)."""
    sealed_at_mono: float
    """Board monotonic time of the seal, seconds (of the boot the batch was sealed in)."""


@dataclass(frozen=True, slots=True)
class SpoolStats:
    """What the heartbeat and the health flag read."""

    batches: int
    """Sealed batches waiting for upload, gap records included (acked ones are not counted)."""
    bytes: int
    """Compressed bodies plus `ROW_OVERHEAD_BYTES` per row, bytes."""
    readings_pending: int
    """Readings in memory, not in the file: pending, or in memory batches while the storage fails."""
    oldest_age_s: float | None
    """Age of the oldest un-acked sealed batch, seconds; ``None`` when there is none."""
    next_seq: int
    """The seq the next seal takes."""
    epoch: str
    """Current epoch (empty while the storage could never be opened)."""
    dropped_batches: int
    """Batches dropped for space or lost to corruption, since the spool was created."""
    dropped_readings: int
    """Readings in those batches, plus readings dropped from a full RAM buffer."""
    dead_letters: int
    """Batches moved aside after the collector refused them."""
    corrupt_set_aside: int
    """Spool files set aside as corrupt."""
    degraded: bool
    """The storage is failing; readings are buffered in RAM."""
    memory_batches: int = 0
    """Batches sealed in memory while the storage failed (sent from there, written to the file later)."""


@dataclass(frozen=True, slots=True)
class Oldest:
    boot: str
    mono: float
    wall: float


@dataclass(frozen=True, slots=True)
class Snapshot:
    """The disk state after an operation, handed from the worker thread to the event loop."""

    epoch: str
    next_seq: int
    batches: int
    bytes: int
    oldest: Oldest | None
    counters: dict[str, int]
    degraded: bool


@dataclass(frozen=True, slots=True)
class Interval:
    epoch: str
    first: int
    last: int
    readings: int
    unknown: bool = False


def envelopes(intervals: Iterable[Interval]) -> list[Interval]:
    """
    One interval per epoch spanning all of ``intervals``; readings add up.

    A spool_full gap record names the *envelope* of what one overflow dropped, so the record count stays
    small however fragmented the drops are (each older gap record a drop folds in sits apart from the
    range it covers). The envelope may span seqs that are still spooled and will arrive; the collector
    counts as lost only covered seqs it never receives, and ``readings`` is exact.
    """
    by_epoch: dict[str, Interval] = {}
    for iv in intervals:
        prev = by_epoch.get(iv.epoch)
        by_epoch[iv.epoch] = (
            iv
            if prev is None
            else Interval(
                iv.epoch,
                min(prev.first, iv.first),
                max(prev.last, iv.last),
                prev.readings + iv.readings,
                prev.unknown or iv.unknown,
            )
        )
    return sorted(by_epoch.values(), key=lambda i: (i.first, i.epoch))


def merge_intervals(intervals: Iterable[Interval]) -> list[Interval]:
    """Merge touching or overlapping seq intervals of the same epoch; readings add up."""
    out: list[Interval] = []
    for iv in sorted(intervals, key=lambda i: (i.epoch, i.first, i.last)):
        if out and out[-1].epoch == iv.epoch and iv.first <= out[-1].last + 1:
            prev = out[-1]
            out[-1] = Interval(
                prev.epoch,
                prev.first,
                max(prev.last, iv.last),
                prev.readings + iv.readings,
                prev.unknown or iv.unknown,
            )
        else:
            out.append(iv)
    return out


def seal_content(content: dict[str, Any]) -> tuple[bytes, bytes, str]:
    """Content → (its canonical bytes, their gzip for the spool file, their digest)."""
    raw = canonical_json(content)
    # mtime=0: the same content always gives the same bytes.
    return raw, gzip.compress(raw, compresslevel=GZIP_LEVEL, mtime=0), digest(raw)


def is_epoch(s: str) -> bool:
    return len(s) == 16 and all(c in "0123456789abcdef" for c in s)


def new_epoch() -> str:
    """A fresh spool epoch: 64 random bits as 16 lower-case hex."""
    return secrets.token_hex(8)
