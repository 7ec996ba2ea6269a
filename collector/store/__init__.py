"""
The collector's storage: one async interface, two backends.

``open_store(url)`` picks the backend: ``sqlite:///path/to/file.db`` (or a bare path) for the embedded
default, ``postgresql://...`` for several collectors on one database (asyncpg, imported lazily).

Times: ``*_at`` and ``t_collector`` are collector Unix seconds (float); ``t_board_ms`` is board
monotonic milliseconds within ``boot``. RSSI is stored in tenths of a dB (``rssi_dd``), calibrated,
with the offset that was added (``offset_dd``), so the raw value is ``rssi_dd - offset_dd``.
"""

from __future__ import annotations

import enum
from collections.abc import AsyncIterator, Callable, Mapping, Sequence
from contextlib import AbstractAsyncContextManager
from dataclasses import dataclass, field
from typing import Any, Protocol

import numpy as np


class StoreError(Exception):
    """Base of the errors the store raises on purpose."""


class StoreUnavailable(StoreError):
    """The database cannot be reached or written now (the API answers 503 + Retry-After)."""


class LeadershipLost(StoreError):
    """A write made under a lock (``lead=``) that this process no longer holds: another collector leads now."""


class SchemaTooNew(StoreError):
    """The database was migrated by a newer listenpost than this one; refusing to touch it."""

    def __init__(self, found: int, supported: int) -> None:
        super().__init__(
            f"database schema version {found} is newer than this listenpost supports "
            f"({supported}); upgrade listenpost or point it at another database"
        )
        self.found = found
        self.supported = supported


class BadBatch(StoreError, ValueError):
    """A batch the database refused (shape or value); ``field`` names the offending field. Nothing was stored."""

    def __init__(self, field: str, problem: str) -> None:
        super().__init__(f"{field}: {problem}")
        self.field = field


class EnrollmentReason(enum.Enum):
    """Why ``complete_enrollment`` refused a code."""

    UNKNOWN = "unknown"
    """No such code (never issued, or replaced by a newer one for its board)."""
    USED = "used"
    """The code was used already."""
    EXPIRED = "expired"
    """``at`` is past the code's ``expires_at``."""


class EnrollmentRefused(StoreError, ValueError):
    """``complete_enrollment`` found the code unusable; checked and consumed atomically, so two racing
    enrollments with one code cannot both succeed."""

    def __init__(self, reason: EnrollmentReason) -> None:
        super().__init__(f"enrollment code {reason.value}")
        self.reason = reason


class IngestStatus(enum.Enum):
    STORED = "stored"
    DUPLICATE = "duplicate"
    """Same (board, epoch, seq) with the same digest: nothing stored twice."""
    CONFLICT = "conflict"
    """Same key, other digest (the API answers 409 and records an event)."""


@dataclass(frozen=True, slots=True)
class Board:
    name: str
    room: str
    floor: str | None
    created_at: float
    enrolled_at: float | None = None
    fingerprint: dict[str, Any] | None = None
    offset_db: float = 0.0
    retired_at: float | None = None


@dataclass(frozen=True, slots=True)
class Enrollment:
    """A one-time code issued by ``board add``; only its hash is stored."""

    board: str
    code_hash: str
    expires_at: float
    used_at: float | None = None


@dataclass(frozen=True, slots=True)
class Calibration:
    board: str
    at: float
    offset_db: float
    spread_db: float
    samples: int
    reference_tag: str
    distance_m: float
    fingerprint: dict[str, Any] | None = None
    """The board's hardware fingerprint when calibrated; a later change flags the board."""


@dataclass(frozen=True, slots=True)
class IngestBatch:
    """One validated batch, ready to store in a single transaction."""

    board: str
    boot: str
    epoch: str
    seq: int
    digest: str
    received_at: float
    offset_db: float
    tags: np.ndarray  # str object array, one per reading
    t_board_ms: np.ndarray  # int64
    t_collector: np.ndarray  # float64, corrected collector time
    rssi_dd: np.ndarray  # int16/int32, calibrated, tenths of dB
    telemetry: Sequence[dict[str, Any]] = ()
    gap: dict[str, Any] | None = None
    """For a gap record: first_seq, last_seq, readings, reason, and the epoch the range belongs to."""
    clock: ClockSample | None = None
    """The clock exchange the request carried, stored in the batch's own transaction."""

    @property
    def n(self) -> int:
        return len(self.t_board_ms)


@dataclass(frozen=True, slots=True)
class IngestResult:
    status: IngestStatus
    stored_digest: str | None = None


@dataclass(frozen=True, slots=True)
class ClockSample:
    board: str
    boot: str
    t1: float
    t2: float
    t3: float
    t4: float


@dataclass(frozen=True, slots=True)
class Heartbeat:
    board: str
    at: float
    boot: str
    stats: dict[str, Any] = field(default_factory=dict)


@dataclass(frozen=True, slots=True)
class Event:
    at: float
    board: str | None
    kind: str
    """``state_changed``, ``loss``, ``digest_conflict``, ``fingerprint_changed``, ..."""
    detail: dict[str, Any] = field(default_factory=dict)
    id: int | None = None
    key: str | None = None
    """Idempotency key (unique in the store): a second event with the same key is not stored. The
    monitor keys state changes by (board, transition, time) and losses by their seq range."""


@dataclass(frozen=True, slots=True)
class WatchBaseline:
    """What the calibration watch remembers of one board, kept so a restart or a new leader goes on from it."""

    board: str
    marker: float
    """The board's offset when the level was learned (a new offset means a new calibration)."""
    baseline_from: float
    """Collector time the level's window began."""
    levels: dict[str, float]
    """Reference tag → raw level at calibration, dBm (empty until the first full window)."""
    shift_since: float | None = None
    """When the current shift first passed the threshold."""
    raised: bool = False
    """Whether that shift has already been an event."""


@dataclass(frozen=True, slots=True)
class BoardCounts:
    board: str
    readings_total: int
    batches_total: int
    last_batch_at: float | None
    gap_readings: int
    """Readings the board reported lost (gap records)."""
    last_boot: str | None = None
    """The boot id of the newest batch, heartbeat or clock exchange."""


@dataclass(frozen=True, slots=True)
class SeqHole:
    """Seqs of one (board, epoch) never stored nor covered by a gap record."""

    board: str
    epoch: str
    first_seq: int
    last_seq: int
    tail: bool = False
    """After the last seq that arrived: batches the board's heartbeats said it had sealed before it moved
    to a new epoch, and never sent."""


@dataclass(frozen=True, slots=True)
class TagTelemetry:
    """The latest telemetry a tag reported (Eddystone-TLM and the like), with the board that heard it."""

    tag: str
    board: str
    at: float
    """Collector Unix seconds when the batch carrying it arrived."""
    t_board_ms: int
    battery_mv: float | None = None
    temperature_c: float | None = None
    adv_count: float | None = None
    uptime_s: float | None = None


@dataclass(frozen=True, slots=True)
class ReadingRows:
    """Columnar readings for export: one entry per reading, equal lengths."""

    board: np.ndarray  # str objects
    tag: np.ndarray  # str objects
    t_collector: np.ndarray  # float64
    rssi_dd: np.ndarray  # int32
    offset_dd: np.ndarray  # int32


SCAN_CHUNK_ROWS = 262_144
"""Rows per `ReadingChunk` of `Store.scan_readings` by default: about 7 MB of columns."""


@dataclass(frozen=True, slots=True)
class ReadingChunk:
    """A slice of the readings `Store.scan_readings` delivers: store ids, and the names of one snapshot."""

    board_id: np.ndarray  # int64 store ids
    tag_id: np.ndarray  # int64 store ids
    t_collector: np.ndarray  # float64
    rssi_dd: np.ndarray  # int32, as the board calibrated it
    board_names: Mapping[int, str]
    """Every board id -> name of the scan's snapshot (the same object in every chunk of one scan)."""
    tag_names: Mapping[int, str]
    """Every tag id -> identity of the scan's snapshot (the same object in every chunk of one scan)."""
    progress: float | None = None
    """Share of the scan done once this chunk is handled (0..1), when the store can tell."""
    offset_dd: np.ndarray | None = None
    """int32, the offset the board had added to each reading (its batch's), tenths of a dB, so the raw
    value is ``rssi_dd - offset_dd``; ``None`` when the chunk's maker did not say."""


class Store(Protocol):
    """What the collector needs from a database. Every method is safe to call concurrently."""

    url: str

    async def close(self) -> None: ...

    # boards and enrollment
    async def add_board(self, board: Board, enrollment: Enrollment) -> None:
        """Create a board with its first enrollment code; ``ValueError`` if the name exists."""

    async def get_board(self, name: str) -> Board | None: ...
    async def list_boards(self, include_retired: bool = True) -> list[Board]: ...
    async def retire_board(self, name: str, at: float) -> bool: ...
    async def new_enrollment(self, enrollment: Enrollment) -> None:
        """Issue a fresh code for an existing board (re-flash); older unused codes stop working."""

    async def get_enrollment(self, code_hash: str) -> Enrollment | None: ...
    async def complete_enrollment(
        self, code_hash: str, token_hash: str, fingerprint: dict[str, Any], at: float
    ) -> Board:
        """Mark the code used and set the board's token and fingerprint, atomically.

        Raises `EnrollmentRefused` (``.reason`` unknown / used / expired) if the code cannot be used at ``at``."""

    async def board_for_token(self, token_hash: str) -> Board | None: ...
    async def set_offset(self, calibration: Calibration) -> None:
        """Store a calibration in the history and make its offset the board's current one."""

    async def calibrations(self, board: str) -> list[Calibration]: ...

    # tags
    async def add_tags(self, ids: Sequence[str], at: float) -> int:
        """Register tags (idempotent; a retired tag becomes active again); returns how many were new."""

    async def retire_tags(self, ids: Sequence[str], at: float) -> int: ...
    async def list_tags(self, include_retired: bool = False) -> list[str]: ...

    # ingest
    async def ingest(self, batch: IngestBatch) -> IngestResult:
        """Store a batch in one durable transaction (or not at all); idempotent on (board, epoch, seq).

        Raises `BadBatch` (nothing stored) for a batch the database refuses, ``ValueError`` for an unknown
        board, `StoreUnavailable` when the database cannot commit now."""

    async def board_counts(self) -> list[BoardCounts]: ...
    async def latest_telemetry(self, tags: Sequence[str] | None = None) -> dict[str, TagTelemetry]:
        """The newest telemetry row per tag (by board time within the newest batch)."""

    async def seq_holes(self, board: str | None = None, *, unreported: bool = False) -> list[SeqHole]:
        """Seq holes now, by board, epoch and first seq: runs inside each epoch's span, and the tails of
        epochs a board has left (`SeqHole.tail`). Kept up to date by ingest and heartbeats (two small
        tables), so this costs the same however many batches are stored. With ``unreported``, only the
        runs not yet marked with `mark_holes_reported` (a partial index) and the tails: what the monitor's
        loss check reads, the same however many losses were reported before."""

    async def mark_holes_reported(self, holes: Sequence[SeqHole]) -> None:
        """Mark runs as reported (their ``loss`` event is stored); one no longer there, or a tail, is
        skipped (tails are computed, one per epoch a board left, not stored)."""

    # clock, heartbeats, events
    async def add_clock_sample(self, sample: ClockSample) -> None: ...
    async def clock_samples(self, board: str, boot: str, since: float | None = None) -> list[ClockSample]: ...
    async def add_heartbeat(self, hb: Heartbeat, clock: ClockSample | None = None) -> None:
        """
        Keep the latest heartbeat per board, plus a bounded history for trends, and its clock exchange,
        in one commit that does not wait for the disk: a heartbeat is telemetry the next one replaces,
        so losing the newest on power loss costs nothing, while an fsync per heartbeat would cost every
        board's batches their share of the disk. It becomes durable with the next batch commit.
        """

    async def heartbeats(self, board: str, since: float) -> list[Heartbeat]: ...
    async def recent_heartbeats(self, since: float) -> dict[str, list[Heartbeat]]:
        """Every board's heartbeats at or after ``since``, oldest first, in one query (boards without one are
        absent): its cost follows the window, not the history kept."""

    async def latest_heartbeats(self) -> dict[str, Heartbeat]: ...
    async def add_event(self, event: Event, *, lead: str | None = None) -> int | None:
        """Store an event; its id, or ``None`` if an event with its ``key`` is stored already.

        With ``lead``, the write is fenced: it commits only if this process still holds the lock ``lead``
        (taken with `exclusive`) and nobody took it since, checked inside the write's own transaction;
        otherwise `LeadershipLost` and nothing is stored."""

    async def events(self, since_id: int = 0, limit: int = 1000, board: str | None = None) -> list[Event]: ...

    # export and retention
    async def readings(
        self,
        t_from: float,
        t_to: float,
        boards: Sequence[str] | None = None,
        tags: Sequence[str] | None = None,
    ) -> ReadingRows: ...
    async def scan_readings(
        self,
        t_from: float,
        t_to: float,
        sink: Callable[[ReadingChunk], None],
        boards: Sequence[str] | None = None,
        tags: Sequence[str] | None = None,
        chunk_rows: int = SCAN_CHUNK_ROWS,
    ) -> int:
        """Hand every reading with ``t_from <= t_collector < t_to`` to ``sink``, in chunks of at most
        ``chunk_rows``, in no promised order, all from one snapshot; returns how many rows went.

        ``sink`` is called one chunk at a time and never on the event loop, so it may do CPU work; only
        one chunk is held at a time. An exception from ``sink`` ends the scan and is raised here;
        cancelling the call stops the scan at the next chunk."""

    async def ensure_reading_days(self, t_from: float, t_to: float) -> int:
        """Make room ahead for readings of every UTC day from ``t_from``'s to ``t_to``'s; returns how
        many day partitions were made. PostgreSQL keeps one partition of ``readings`` per day and makes
        a missing one at ingest too, so this only moves that work off the ingest path; SQLite has one
        table and nothing to do (0)."""

    async def delete_readings_before(
        self, t: float, chunk: int = 10_000, max_chunks: int | None = None
    ) -> int:
        """Remove raw readings older than ``t`` in chunks of ``chunk`` rows; returns exactly how many went.

        With ``max_chunks`` at most that many chunks go per table in this call, so a caller can spread a
        large backlog over several calls (the monitor does, one call per round): a return value of
        ``chunk * max_chunks`` or more means there may be more. On PostgreSQL whole days before ``t`` are
        dropped instead (at most ``max_chunks`` days per call, every row counted), and only the day that
        straddles ``t`` is deleted in chunks. Telemetry rows older than ``t`` go too (not counted); batch
        headers and clock samples have their own cut (`delete_history_before`)."""

    async def delete_history_before(
        self,
        *,
        heartbeats: float | None = None,
        clock_samples: float | None = None,
        batches: float | None = None,
        chunk: int = 10_000,
        max_chunks: int | None = None,
    ) -> dict[str, int]:
        """Remove heartbeats, clock samples and batch headers (dedup keys) older than their cut (``None``:
        keep), in chunks as `delete_readings_before`; returns rows deleted per table.

        Kept whatever their age: each board's newest heartbeat, the newest clock sample of each (board,
        boot), the newest batch of each (board, epoch) and batches that telemetry rows still point at.
        A batch's readings point at it too: ``batches`` must be older than the readings' cut."""

    def exclusive(self, name: str) -> AbstractAsyncContextManager[bool]:
        """Run-once work across collectors: yields True if this process holds the lock ``name``.

        Leaving the block releases the lock within a bound, even on a dead connection, and never turns a
        cancellation into another error."""
        ...

    async def watch_baselines(self) -> dict[str, WatchBaseline]:
        """Every board's stored calibration-watch state."""
        ...

    async def set_watch_baselines(self, baselines: Sequence[WatchBaseline]) -> None:
        """Replace these boards' calibration-watch state, in one transaction."""
        ...

    async def holds(self, name: str) -> bool:
        """Whether the lock ``name`` taken with `exclusive` is still this process's (asks the database)."""
        ...


async def open_store(url: str, **options: Any) -> Store:
    """Open (and migrate) the store named by ``url``."""
    if url.startswith(("postgresql://", "postgres://")):
        from listenpost.collector.store.postgres import PostgresStore

        return await PostgresStore.open(url, **options)
    from listenpost.collector.store.sqlite import SqliteStore

    path = url.removeprefix("sqlite:///") if url.startswith("sqlite:///") else url.removeprefix("sqlite://")
    return await SqliteStore.open(path, **options)


__all__ = [
    "AsyncIterator",
    "BadBatch",
    "Board",
    "BoardCounts",
    "Calibration",
    "ClockSample",
    "Enrollment",
    "EnrollmentReason",
    "EnrollmentRefused",
    "Event",
    "Heartbeat",
    "IngestBatch",
    "IngestResult",
    "IngestStatus",
    "LeadershipLost",
    "ReadingChunk",
    "ReadingRows",
    "SCAN_CHUNK_ROWS",
    "SchemaTooNew",
    "SeqHole",
    "Store",
    "StoreError",
    "StoreUnavailable",
    "TagTelemetry",
    "open_store",
]
