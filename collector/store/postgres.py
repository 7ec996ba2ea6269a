"""
The multi-collector store: PostgreSQL through an asyncpg pool.

- A batch that is the next seq of its epoch (no gap record, no telemetry) goes in by one statement, its
  own commit: one round trip (`_store_next_sql`). Every other batch, and one that statement declines
  (having changed nothing), is one transaction with its readings in by COPY (``copy_records_to_table``).
  The export reads readings back with ``COPY ... TO STDOUT (FORMAT binary)`` parsed straight into numpy
  columns.
- ``synchronous_commit=on`` is set on every pooled connection, so a database or role default of ``off``
  cannot turn a 200 into a promise the server may forget.
- Connection loss, a server restart, a lock held past ``lock_timeout_s``, a pool exhausted past
  ``acquire_timeout_s`` or a statement past ``command_timeout_s`` → `StoreUnavailable`; after a lost
  connection the pool's other connections are expired, so the next call reconnects instead of tripping
  over every stale one in turn.
- `exclusive` takes a session advisory lock (``pg_try_advisory_lock``) on one pooled connection for the
  length of the block: liveness evaluation and retention run in one collector at a time. The key comes
  from the schema and the name (advisory locks are per database, and schemas share one). Taking the lock
  bumps its term in ``leases``; `holds` asks the lock's own session for that term, and a write with
  ``lead=`` checks it in its own transaction, so a collector whose lock session died (and the lock with
  it) cannot write as leader after another took over. Releasing is bounded by ``lock_timeout_s``; a
  session that cannot be released is closed, which frees its locks on the server.
- ``readings`` is partitioned by range of ``t_collector``, one partition per UTC day, named
  ``readings_YYYYMMDD`` (migration 7). There is no DEFAULT partition: a batch whose readings fall on a
  day without a partition creates it first (`ensure_reading_days`), in a short transaction of its own
  before the batch's, so every finite time has a home and nothing waits in a catch-all that every later
  partition creation would have to scan (and that a row of a later day would make that creation fail
  on). The monitor's retention pass and the app at start create today's and tomorrow's partitions
  ahead, so ingest normally finds its day made. Retention detaches and drops the days wholly before the
  cut, counting their rows exactly first, and deletes in chunks only in the day that straddles it.
"""

from __future__ import annotations

import asyncio
import contextlib
import datetime
import hashlib
import json
import math
import os
import re
import socket
from collections.abc import AsyncIterator, Callable, Iterable, Sequence
from itertools import repeat
from typing import Any

import asyncpg
import numpy as np
import structlog

from listenpost.collector.store import (
    SCAN_CHUNK_ROWS,
    BadBatch,
    Board,
    BoardCounts,
    Calibration,
    ClockSample,
    Enrollment,
    EnrollmentReason,
    EnrollmentRefused,
    Event,
    Heartbeat,
    IngestBatch,
    IngestResult,
    IngestStatus,
    LeadershipLost,
    ReadingChunk,
    ReadingRows,
    SeqHole,
    StoreUnavailable,
    TagTelemetry,
    WatchBaseline,
)
from listenpost.collector.store.common import (
    BATCH_COLS,
    BOARD_COLS,
    HISTORY_TABLES,
    LATEST_TELEMETRY_SQL,
    OFFSET_CHANGES_SQL,
    READING_COPY_COLUMNS,
    SEQ_HOLES_SQL,
    TELEMETRY_FIELDS,
    WATCH_COLS,
    OffsetChanges,
    batch_row,
    batch_tag_names,
    board_from_row,
    calibration_from_row,
    check_batch,
    check_chunks,
    check_clock_sample,
    constraint_field,
    cover_seqs,
    delete_history_in_chunks,
    delete_in_chunks,
    json_text,
    pieces_reported,
    reading_tag_ids,
    seq_intervals,
    spool_mark,
    watch_from_row,
    watch_row,
)
from listenpost.collector.store.migrations import migrate_postgres

log = structlog.get_logger("listenpost.collector.store.postgres")

_INSERT_BATCH = (
    f"INSERT INTO batches ({', '.join(BATCH_COLS)}) "
    f"VALUES ({', '.join(f'${i}' for i in range(1, len(BATCH_COLS) + 1))}) "
    "ON CONFLICT (board_id, epoch, seq) DO NOTHING RETURNING id"
)
assert BATCH_COLS[:8] == ("board_id", "epoch", "seq", "digest", "boot", "n", "received_at", "offset_dd")
_LOCK_BOARD = "SELECT FROM boards WHERE id = $1 FOR NO KEY UPDATE"
"""Every batch's first lock: its board's row, so one board's batches queue on it (then on the seq span,
then the counts) and never hold those in opposite orders."""


def _count_batch(
    n: str, gap: str, at: str, boot: str, board: str, sample: tuple[str, str] | None = None
) -> str:
    """The UPDATE of a stored batch's counts on its board (SQL expressions for the values).

    With ``sample`` (its boot, its t2), the board's boot is first noted as of the request's clock sample,
    as `_insert_clock_sample` notes it: a statement updates a row once, so the one UPDATE computes what
    the sample's and then the batch's would leave (NULL ``last_boot_at`` included)."""
    last_boot, last_boot_at = "last_boot", "last_boot_at"
    if sample is not None:
        s_boot, t2 = sample
        newer = f"(last_boot_at IS NULL OR last_boot_at <= {t2})"
        last_boot = f"(CASE WHEN {newer} THEN {s_boot} ELSE last_boot END)"
        last_boot_at = f"(CASE WHEN {newer} THEN {t2} ELSE last_boot_at END)"
    return (
        f"UPDATE boards SET readings_total = readings_total + {n}, batches_total = batches_total + 1, "
        f"gap_readings = gap_readings + {gap}, last_batch_at = greatest(last_batch_at, {at}), "
        f"last_boot = CASE WHEN {last_boot_at} IS NULL OR {last_boot_at} <= {at} THEN {boot} ELSE {last_boot} END, "
        f"last_boot_at = greatest({last_boot_at}, {at}) WHERE id = {board}"
    )


# In the general path's transaction, after its first statement locked the board's row: the batch row; if
# it went in (not a duplicate) and its seq is the next of the (board, epoch)'s span, the span extended (the
# UPDATE locks the span row and re-checks reach under the lock, as _account_seqs' FOR UPDATE does); and if
# that applied, the board's counts. Returns the new batch id (NULL for a duplicate) and whether the rest
# (span and counts) is done.
_STORE_NEXT_BATCH = (
    f"WITH ins AS ({_INSERT_BATCH}), "
    "extended AS (UPDATE seq_reach SET reach = $3 WHERE board_id = $1 AND epoch = $2 AND reach = $3 - 1 "
    "AND EXISTS (SELECT FROM ins) RETURNING 1), "
    "counted AS ("
    + _count_batch(n="$6", gap="$14", at="$7", boot="$5", board="$1")
    + " AND EXISTS (SELECT FROM extended)) "
    "SELECT (SELECT id FROM ins), EXISTS (SELECT FROM extended)"
)
_COUNT_ONE_BATCH = _count_batch(n="$1", gap="$2", at="$3", boot="$4", board="$5")


def _store_next_sql(with_sample: bool) -> str:
    """
    The common case of storing a batch, whole, in one statement outside any transaction (its own commit,
    one round trip): a batch with no gap record and no telemetry whose seq is the next of its (board,
    epoch)'s span.

    The board's row is locked first, as the general path's first statement does; then the span is
    extended (the UPDATE locks the span row and re-checks reach under the lock), and everything else
    hangs on that: the batch row ($1..$8), its readings ($9..$12, one `_as_grid` per column), the request's
    clock sample if ``with_sample`` ($13..$17: boot, t1..t4) and one UPDATE of the board's counts and
    boot. Returns the batch id, or no row: then the batch is not the common case (the first of its
    epoch, late, out of order, a duplicate or a conflict), the statement changed nothing, and the
    general path stores it.
    """
    reading = {"batch_id": "ins.id", "board_id": "$1"}  # the rest from the arrays, by column name
    sample = (
        "sampled AS (INSERT INTO clock_samples (board_id, boot, t1, t2, t3, t4) "
        "SELECT $1, $13, $14, $15, $16, $17 FROM ins), "
        if with_sample
        else ""
    )
    return (
        f"WITH board AS ({_LOCK_BOARD}), "
        "extended AS (UPDATE seq_reach SET reach = $3 WHERE board_id = $1 AND epoch = $2 "
        "AND reach = $3 - 1 AND EXISTS (SELECT FROM board) RETURNING 1), "
        f"ins AS (INSERT INTO batches ({', '.join(BATCH_COLS[:8])}) "
        f"SELECT {', '.join(f'${i}' for i in range(1, 9))} FROM extended "
        "ON CONFLICT (board_id, epoch, seq) DO NOTHING RETURNING id), "
        f"ins_readings AS (INSERT INTO readings ({', '.join(READING_COPY_COLUMNS)}) "
        f"SELECT {', '.join(reading.get(c, f'u.{c}') for c in READING_COPY_COLUMNS)} FROM ins, "
        "unnest($9::float8[], $10::int8[], $11::int4[], $12::int2[]) AS u(t_collector, t_board_ms, tag_id, rssi_dd) "
        "WHERE u.t_collector IS NOT NULL), "  # the padding of `_as_grid`
        + sample
        + "counted AS ("
        + _count_batch("$6", "0", "$7", "$5", "$1", ("$13", "$15") if with_sample else None)
        + " AND EXISTS (SELECT FROM ins)) "
        "SELECT id FROM ins"
    )


_STORE_NEXT = _store_next_sql(with_sample=False)
_STORE_NEXT_WITH_SAMPLE = _store_next_sql(with_sample=True)


def _heartbeat_sql(with_sample: bool) -> str:
    """
    A heartbeat, whole, in one statement and its own commit (one round trip): $1 board, $2 at, $3 boot,
    $4 stats, $5 how many of the board's older heartbeats to keep (the history less this one: the trim
    sees the rows as they were before the statement), $6/$7 the spool's epoch and highest sealed seq
    (`spool_mark`, NULL when the stats hold none); with ``with_sample`` the request's clock sample
    ($8 boot, $9..$12 t1..t4). Returns 1, or 0 for a board that does not exist.

    The board's row is updated (so locked) first, as on every batch path: the statement's result reads
    it, and everything else waits on it. (A row-locking SELECT of the board beside an UPDATE of it in
    one statement would find the row already changed by the same command and return nothing.) One UPDATE
    notes the sample's boot as of its t2, then the heartbeat's as of its own time, and the spool's
    epoch: what those three would leave one after the other. The heartbeat's telemetry the next one
    replaces, so the commit does not wait for the WAL flush (set_config local to the transaction).
    """
    sample = (
        "k AS (INSERT INTO clock_samples (board_id, boot, t1, t2, t3, t4) "
        "SELECT $1, $8, $9, $10, $11, $12 FROM board), "
        if with_sample
        else ""
    )
    last_boot, last_boot_at = "last_boot", "last_boot_at"
    if with_sample:
        newer = "(last_boot_at IS NULL OR last_boot_at <= $10)"
        last_boot = f"(CASE WHEN {newer} THEN $8 ELSE last_boot END)"
        last_boot_at = f"(CASE WHEN {newer} THEN $10 ELSE last_boot_at END)"
    contact = f"({last_boot_at} IS NULL OR {last_boot_at} <= $2)"
    spool = "($6::text IS NOT NULL AND (spool_epoch_at IS NULL OR spool_epoch_at <= $2))"
    return (
        "WITH cfg AS (SELECT set_config('synchronous_commit', 'off', true)), "
        f"board AS (UPDATE boards SET last_boot = CASE WHEN {contact} THEN $3 ELSE {last_boot} END, "
        f"last_boot_at = CASE WHEN {contact} THEN $2 ELSE {last_boot_at} END, "
        f"spool_epoch = CASE WHEN {spool} THEN $6 ELSE spool_epoch END, "
        f"spool_epoch_at = CASE WHEN {spool} THEN $2 ELSE spool_epoch_at END "
        "WHERE id = $1 RETURNING 1), "
        "h AS (INSERT INTO heartbeats (board_id, at, boot, stats) SELECT $1, $2, $3, $4 FROM cfg, board), "
        + sample
        + "trimmed AS (DELETE FROM heartbeats WHERE id IN (SELECT id FROM heartbeats WHERE board_id = $1 "
        "AND EXISTS (SELECT FROM board) ORDER BY at DESC, id DESC OFFSET $5)), "
        # Only an epoch some batch opened has a span whose announced seqs can grow.
        "announced AS (UPDATE seq_reach SET announced = GREATEST(coalesce(announced, -1), $7) "
        "WHERE board_id = $1 AND epoch = $6 AND $7::bigint IS NOT NULL AND EXISTS (SELECT FROM board)) "
        "SELECT count(*) FROM board"
    )


_HEARTBEAT = _heartbeat_sql(with_sample=False)
_HEARTBEAT_WITH_SAMPLE = _heartbeat_sql(with_sample=True)

# Errors that say "the database cannot do it now" (retry later), not "this request is wrong".
_UNAVAILABLE: tuple[type[BaseException], ...] = (
    OSError,
    TimeoutError,
    asyncpg.InterfaceError,
    asyncpg.PostgresConnectionError,
    asyncpg.exceptions.OperatorInterventionError,  # admin shutdown, crash shutdown, cannot connect now
    asyncpg.exceptions.InsufficientResourcesError,  # disk full, too many connections
    asyncpg.exceptions.LockNotAvailableError,  # lock_timeout
    asyncpg.exceptions.TransactionRollbackError,  # deadlock, serialization failure
    asyncpg.exceptions.ReadOnlySQLTransactionError,  # talking to a standby after a failover
)
# ...and of those, the ones after which pooled connections are probably dead.
_CONNECTION_LOST: tuple[type[BaseException], ...] = (
    OSError,
    asyncpg.InterfaceError,
    asyncpg.PostgresConnectionError,
    asyncpg.exceptions.AdminShutdownError,
    asyncpg.exceptions.CrashShutdownError,
    asyncpg.exceptions.CannotConnectNowError,
)

_INT16_MIN, _INT16_MAX = -(2**15), 2**15 - 1
"""The range of a ``smallint`` column (``readings.rssi_dd``)."""

_SCHEMA_RE = re.compile(r"[a-z_][a-z0-9_]{0,62}")

# COPY binary format (PostgreSQL docs, "COPY", section "Binary Format"): 11-byte signature, int32 flags,
# int32 header-extension length; per tuple an int16 field count, then per field an int32 length and the
# value, all big-endian; an int16 -1 trailer. Our export query yields five NOT NULL fixed-width fields.
_COPY_SIGNATURE = b"PGCOPY\n\xff\r\n\x00"
_EXPORT_ROW = np.dtype(
    [
        ("nf", ">i2"),
        ("l0", ">i4"),
        ("board_id", ">i4"),
        ("l1", ">i4"),
        ("tag_id", ">i4"),
        ("l2", ">i4"),
        ("t_collector", ">f8"),
        ("l3", ">i4"),
        ("rssi_dd", ">i4"),
        ("l4", ">i4"),
        ("offset_dd", ">i4"),
    ]
)
_EXPORT_LENGTHS = {"l0": 4, "l1": 4, "l2": 8, "l3": 4, "l4": 4}


# `scan_readings`'s rows in the same binary COPY layout: five NOT NULL fixed-width fields.
_SCAN_ROW = np.dtype(
    [
        ("nf", ">i2"),
        ("l0", ">i4"),
        ("board_id", ">i4"),
        ("l1", ">i4"),
        ("tag_id", ">i4"),
        ("l2", ">i4"),
        ("t_collector", ">f8"),
        ("l3", ">i4"),
        ("rssi_dd", ">i4"),
        ("l4", ">i4"),
        ("batch_id", ">i8"),
    ]
)
_SCAN_LENGTHS = {"l0": 4, "l1": 4, "l2": 8, "l3": 4, "l4": 8}
SCAN_MAX_SECONDS = 6 * 3600.0
"""Longest a `PostgresStore.scan_readings` COPY may run in all (it also fails after a stall)."""


class _CopyChunks:
    """Cuts a binary COPY stream, fed in pieces, into bodies of whole rows (at most ``rows`` each)."""

    def __init__(self, rows: int) -> None:
        self._size = rows * _SCAN_ROW.itemsize
        self._buf = bytearray()
        self._header = False

    def feed(self, data: bytes) -> list[bytes]:
        self._buf += data
        if not self._header:
            if len(self._buf) < 19:
                return []
            if bytes(self._buf[:11]) != _COPY_SIGNATURE:
                raise ValueError("not a PostgreSQL binary COPY stream (bad signature)")
            start = 19 + int.from_bytes(self._buf[15:19], "big")
            if len(self._buf) < start:
                return []
            del self._buf[:start]
            self._header = True
        out = []
        while len(self._buf) >= self._size:
            out.append(bytes(self._buf[: self._size]))
            del self._buf[: self._size]
        return out

    def finish(self) -> bytes:
        """The rows left after the last full chunk; checks the trailer."""
        if not self._header or bytes(self._buf[-2:]) != b"\xff\xff":
            raise ValueError("binary COPY stream has no trailer")
        body = bytes(self._buf[:-2])
        self._buf.clear()
        return body


def _parse_scan_rows(body: bytes) -> np.ndarray:
    if len(body) % _SCAN_ROW.itemsize:
        raise ValueError(f"binary COPY body of {len(body)} bytes is not whole {_SCAN_ROW.itemsize}-byte rows")
    rows = np.frombuffer(body, dtype=_SCAN_ROW)
    if len(rows) and (np.any(rows["nf"] != 5) or any(np.any(rows[k] != v) for k, v in _SCAN_LENGTHS.items())):
        raise ValueError("binary COPY rows do not have the expected five fixed-width fields")
    return rows


def lock_key(name: str, scope: str) -> int:
    """The signed 64-bit advisory-lock key for lock ``name`` of schema ``scope`` (sha256, so every
    collector on that schema computes the same, and collectors on other schemas of the database others)."""
    return int.from_bytes(
        hashlib.sha256(f"listenpost:{scope}:{name}".encode()).digest()[:8], "big", signed=True
    )


def parse_copy_binary(buf: bytes | bytearray | memoryview) -> np.ndarray:
    """Parse the export query's ``COPY ... (FORMAT binary)`` output into a structured array."""
    mv = memoryview(buf)
    if bytes(mv[:11]) != _COPY_SIGNATURE:
        raise ValueError("not a PostgreSQL binary COPY stream (bad signature)")
    ext = int.from_bytes(mv[15:19], "big")
    start = 19 + ext
    if len(mv) < start + 2 or bytes(mv[-2:]) != b"\xff\xff":
        raise ValueError("binary COPY stream has no trailer")
    body = mv[start:-2]
    if len(body) % _EXPORT_ROW.itemsize:
        raise ValueError(
            f"binary COPY body of {len(body)} bytes is not whole {_EXPORT_ROW.itemsize}-byte rows"
        )
    rows = np.frombuffer(body, dtype=_EXPORT_ROW)
    if len(rows) and (
        np.any(rows["nf"] != 5) or any(np.any(rows[k] != v) for k, v in _EXPORT_LENGTHS.items())
    ):
        raise ValueError("binary COPY rows do not have the expected five fixed-width fields")
    return rows


DAY_SECONDS = 86400.0
"""Span of one readings partition: a UTC day (Unix time has no leap seconds, so every day is this long)."""
DDL_LOCK_TIMEOUT_S = 1.0
"""Longest wait for the lock a partition needs created or detached. That DDL locks ``readings`` whole,
so it waits behind every open transaction on it (a long export among them) while every new ingest queues
behind the DDL: a short wait bounds that stall. Creation ahead and retention retry on their next pass."""
DROP_COUNT_MAX_SECONDS = 3600.0
"""Longest the exact count of a day being dropped may run: one sequential read of the partition, which
a busy day makes longer than the per-statement timeout allows."""
_DAY_NAME = re.compile(r"readings_(\d{4})(\d{2})(\d{2})")
_DROPPING = "_dropped"
"""Suffix of a day detached from ``readings`` whose count and drop are still to come."""
_EPOCH_DATE = datetime.date(1970, 1, 1)


def reading_day(t: float) -> int:
    """The UTC day (days since 1970-01-01) whose partition holds a reading at collector time ``t``."""
    return math.floor(t / DAY_SECONDS)


def partition_name(day: int) -> str:
    """``readings_YYYYMMDD`` of UTC day ``day``; the same text migration 7 makes with ``to_char``.

    Raises:
        OverflowError: the day is outside the years 1 to 9999.
    """
    d = _EPOCH_DATE + datetime.timedelta(days=day)
    return f"readings_{d.year:04d}{d.month:02d}{d.day:02d}"


def _day_of(name: str) -> int | None:
    """The UTC day a ``readings_YYYYMMDD`` name stands for; None for any other name."""
    m = _DAY_NAME.fullmatch(name)
    try:
        return None if m is None else (datetime.date(*map(int, m.groups())) - _EPOCH_DATE).days
    except ValueError:  # eight digits that are no date
        return None


async def _partition_days(con: asyncpg.Connection) -> dict[int, str]:
    """Day -> name of every partition of ``readings`` now (from the catalog)."""
    rows = await con.fetch(
        "SELECT c.relname FROM pg_inherits i JOIN pg_class c ON c.oid = i.inhrelid "
        "WHERE i.inhparent = 'readings'::regclass"
    )
    named = ((_day_of(r[0]), r[0]) for r in rows)
    return {d: name for d, name in named if d is not None}


def _count(status: str) -> int:
    return int(status.rsplit(" ", 1)[-1])


class PostgresStore:
    """
    The `Store` on PostgreSQL.

    Attributes:
        url: the connection URL it was opened with.
        schema: the schema holding the tables (``None``: the server's default ``search_path``).
    """

    def __init__(
        self,
        url: str,
        schema: str | None,
        heartbeat_history: int,
        acquire_timeout_s: float,
        command_timeout_s: float,
        lock_timeout_s: float,
    ) -> None:
        self.url = url
        self.schema = schema
        self.lock_scope = ""
        """The schema the tables live in (``current_schema()`` at open): part of every lock key."""
        self._heartbeat_history = heartbeat_history
        self._acquire_timeout_s = acquire_timeout_s
        self._command_timeout_s = command_timeout_s
        self._lock_timeout_s = lock_timeout_s
        self._held: dict[str, tuple[asyncpg.Connection, int]] = {}
        """Locks held now: name -> (the session holding it, the term it took)."""
        self._holder = f"{socket.gethostname()}:{os.getpid()}"
        self._pool: asyncpg.Pool | None = None
        self._closed = False
        self._board_ids: dict[str, int] = {}
        self._tag_ids: dict[str, int] = {}
        self._lock_sessions: set[int] = set()
        """Server pids of pooled sessions `exclusive` took an advisory lock on: reset in full on release."""
        self._days: set[int] = set()
        """Days known to have a readings partition. Another collector's retention may drop one behind
        this process's back: an insert that then finds no partition makes it again (`ingest`)."""

    async def _release(self, con: asyncpg.Connection) -> None:
        """
        Pool reset on release. asyncpg rolls back an open transaction before this; the full reset (a
        round trip: unlock advisory locks, CLOSE ALL, UNLISTEN, RESET ALL) only follows `exclusive`,
        the one place that leaves session state (its lock). Every other use of a connection here keeps
        to transactions and SET LOCAL, so a batch or heartbeat costs no reset round trip.
        """
        if con.get_server_pid() in self._lock_sessions:
            self._lock_sessions.discard(con.get_server_pid())
            await con.reset()

    @classmethod
    async def open(
        cls,
        url: str,
        *,
        schema: str | None = None,
        min_size: int = 1,
        max_size: int = 10,
        connect_timeout_s: float = 5.0,
        command_timeout_s: float = 30.0,
        acquire_timeout_s: float = 10.0,
        lock_timeout_s: float = 5.0,
        heartbeat_history: int = 2880,
    ) -> PostgresStore:
        """
        Connect a pool, create ``schema`` if asked for one, and migrate.

        Args:
            url: ``postgresql://user@host:port/db``.
            schema: put the tables in this schema (created if missing); tests use one per test.
            min_size / max_size: pool size, connections.
            connect_timeout_s: per connection attempt, seconds.
            command_timeout_s: per statement, seconds.
            acquire_timeout_s: longest wait for a free pooled connection, seconds.
            lock_timeout_s: longest wait for a row or table lock inside the server, seconds; also the
                bound on releasing a run-once lock and on proving it is still held (`holds`).
            heartbeat_history: heartbeats kept per board.

        Raises:
            StoreUnavailable: the server cannot be reached.
            SchemaTooNew: the schema was migrated by a newer listenpost.
        """
        if schema is not None and not _SCHEMA_RE.fullmatch(schema):
            raise ValueError(f"schema must match {_SCHEMA_RE.pattern}, got {schema!r}")
        if not 1 <= min_size <= max_size or heartbeat_history < 1:
            raise ValueError("need 1 <= min_size <= max_size and heartbeat_history >= 1")
        store = cls(url, schema, heartbeat_history, acquire_timeout_s, command_timeout_s, lock_timeout_s)
        settings = {
            "synchronous_commit": "on",
            "lock_timeout": str(round(lock_timeout_s * 1000)),
            "application_name": "listenpost-collector",
        }
        if schema is not None:
            settings["search_path"] = schema
        try:
            if schema is not None:
                con = await asyncpg.connect(url, timeout=connect_timeout_s)
                try:
                    await con.execute(f'CREATE SCHEMA IF NOT EXISTS "{schema}"', timeout=command_timeout_s)
                finally:
                    await con.close(timeout=connect_timeout_s)
            store._pool = await asyncpg.create_pool(
                url,
                min_size=min_size,
                max_size=max_size,
                timeout=connect_timeout_s,
                command_timeout=command_timeout_s,
                server_settings=settings,
                reset=store._release,
            )
        except _UNAVAILABLE as e:
            raise StoreUnavailable(f"PostgreSQL unreachable: {type(e).__name__}: {e}") from e
        try:
            async with store._acquire() as con:
                await migrate_postgres(con)
                store.lock_scope = await con.fetchval("SELECT current_schema()")
                store._days = set(await _partition_days(con))
        except BaseException:
            await store._pool.close()
            raise
        log.info("store_opened", backend="postgres", schema=schema, pool_max=max_size)
        return store

    async def close(self) -> None:
        """Close the pool (waits for connections in use to be released)."""
        if self._closed or self._pool is None:
            return
        self._closed = True
        try:
            await asyncio.wait_for(self._pool.close(), self._command_timeout_s)
        except TimeoutError:
            self._pool.terminate()
        log.info("store_closed", backend="postgres", schema=self.schema)

    @contextlib.asynccontextmanager
    async def _acquire(self) -> AsyncIterator[asyncpg.Connection]:
        """A pooled connection; unavailability of any kind inside the block becomes `StoreUnavailable`."""
        if self._closed or self._pool is None:
            raise StoreUnavailable("store is closed")
        try:
            async with self._pool.acquire(timeout=self._acquire_timeout_s) as con:
                yield con
        except _UNAVAILABLE as e:
            # TimeoutError is an OSError, but a busy pool or a slow statement leaves connections healthy.
            if isinstance(e, _CONNECTION_LOST) and not isinstance(e, TimeoutError):
                with contextlib.suppress(Exception):
                    await self._pool.expire_connections()
                log.warning("store_connection_lost", backend="postgres", error=f"{type(e).__name__}: {e}")
            raise StoreUnavailable(f"PostgreSQL unavailable: {type(e).__name__}: {e}") from e

    async def _fetch(self, sql: str, *args: Any) -> list[asyncpg.Record]:
        async with self._acquire() as con:
            return await con.fetch(sql, *args)

    async def _board_id(self, con: asyncpg.Connection, name: str) -> int:
        bid = self._board_ids.get(name)
        if bid is None:
            bid = await con.fetchval("SELECT id FROM boards WHERE name = $1", name)
            if bid is None:
                raise ValueError(f"unknown board {name!r}")
            self._board_ids[name] = bid
        return bid

    # -- boards and enrollment -------------------------------------------------------------------------

    async def add_board(self, board: Board, enrollment: Enrollment) -> None:
        if enrollment.board != board.name:
            raise ValueError(f"enrollment.board {enrollment.board!r} is not the new board {board.name!r}")
        async with self._acquire() as con, con.transaction():
            try:
                bid = await con.fetchval(
                    f"INSERT INTO boards ({BOARD_COLS}) VALUES ($1, $2, $3, $4, $5, $6, $7, $8) RETURNING id",
                    board.name,
                    board.room,
                    board.floor,
                    board.created_at,
                    board.enrolled_at,
                    json_text(board.fingerprint),
                    board.offset_db,
                    board.retired_at,
                )
            except asyncpg.UniqueViolationError as e:
                raise ValueError(f"board {board.name!r} already exists") from e
            await con.execute(
                "INSERT INTO enrollments (code_hash, board_id, expires_at, used_at) VALUES ($1, $2, $3, $4)",
                enrollment.code_hash,
                bid,
                enrollment.expires_at,
                enrollment.used_at,
            )

    async def get_board(self, name: str) -> Board | None:
        rows = await self._fetch(f"SELECT {BOARD_COLS} FROM boards WHERE name = $1", name)
        return board_from_row(rows[0]) if rows else None

    async def list_boards(self, include_retired: bool = True) -> list[Board]:
        where = "" if include_retired else "WHERE retired_at IS NULL"
        return [
            board_from_row(r)
            for r in await self._fetch(f"SELECT {BOARD_COLS} FROM boards {where} ORDER BY name")
        ]

    async def retire_board(self, name: str, at: float) -> bool:
        async with self._acquire() as con:
            st = await con.execute(
                "UPDATE boards SET retired_at = $1 WHERE name = $2 AND retired_at IS NULL", at, name
            )
        return _count(st) == 1

    async def new_enrollment(self, enrollment: Enrollment) -> None:
        async with self._acquire() as con, con.transaction():
            bid = await self._board_id(con, enrollment.board)
            await con.execute("DELETE FROM enrollments WHERE board_id = $1 AND used_at IS NULL", bid)
            await con.execute(
                "INSERT INTO enrollments (code_hash, board_id, expires_at, used_at) VALUES ($1, $2, $3, $4)",
                enrollment.code_hash,
                bid,
                enrollment.expires_at,
                enrollment.used_at,
            )

    async def get_enrollment(self, code_hash: str) -> Enrollment | None:
        rows = await self._fetch(
            "SELECT b.name, e.code_hash, e.expires_at, e.used_at FROM enrollments e "
            "JOIN boards b ON b.id = e.board_id WHERE e.code_hash = $1",
            code_hash,
        )
        return Enrollment(*rows[0]) if rows else None

    async def complete_enrollment(
        self, code_hash: str, token_hash: str, fingerprint: dict[str, Any], at: float
    ) -> Board:
        async with self._acquire() as con, con.transaction():
            row = await con.fetchrow(
                "SELECT board_id, expires_at, used_at FROM enrollments WHERE code_hash = $1 FOR UPDATE",
                code_hash,
            )
            if row is None:
                raise EnrollmentRefused(EnrollmentReason.UNKNOWN)
            if row["used_at"] is not None:
                raise EnrollmentRefused(EnrollmentReason.USED)
            if at > row["expires_at"]:
                raise EnrollmentRefused(EnrollmentReason.EXPIRED)
            await con.execute("UPDATE enrollments SET used_at = $1 WHERE code_hash = $2", at, code_hash)
            r = await con.fetchrow(
                f"UPDATE boards SET token_hash = $1, fingerprint = $2, enrolled_at = $3 "
                f"WHERE id = $4 RETURNING {BOARD_COLS}",
                token_hash,
                json_text(fingerprint),
                at,
                row["board_id"],
            )
            return board_from_row(r)

    async def board_for_token(self, token_hash: str) -> Board | None:
        rows = await self._fetch(f"SELECT {BOARD_COLS} FROM boards WHERE token_hash = $1", token_hash)
        return board_from_row(rows[0]) if rows else None

    async def set_offset(self, calibration: Calibration) -> None:
        c = calibration
        async with self._acquire() as con, con.transaction():
            bid = await self._board_id(con, c.board)
            await con.execute(
                "INSERT INTO calibrations (board_id, at, offset_db, spread_db, samples, reference_tag, "
                "distance_m, fingerprint) VALUES ($1, $2, $3, $4, $5, $6, $7, $8)",
                bid,
                c.at,
                c.offset_db,
                c.spread_db,
                c.samples,
                c.reference_tag,
                c.distance_m,
                json_text(c.fingerprint),
            )
            await con.execute("UPDATE boards SET offset_db = $1 WHERE id = $2", c.offset_db, bid)

    async def calibrations(self, board: str) -> list[Calibration]:
        rows = await self._fetch(
            "SELECT b.name, c.at, c.offset_db, c.spread_db, c.samples, c.reference_tag, c.distance_m, c.fingerprint "
            "FROM calibrations c JOIN boards b ON b.id = c.board_id WHERE b.name = $1 ORDER BY c.at, c.id",
            board,
        )
        return [calibration_from_row(r) for r in rows]

    # -- tags --------------------------------------------------------------------------------------------

    async def add_tags(self, ids: Sequence[str], at: float) -> int:
        wanted = sorted(set(ids))
        async with self._acquire() as con, con.transaction():
            active = await con.fetchval(
                "SELECT count(*) FROM tags WHERE tag = ANY($1::text[]) AND "
                "added_at IS NOT NULL AND retired_at IS NULL",
                wanted,
            )
            await con.execute(
                "INSERT INTO tags (tag, added_at) SELECT unnest($1::text[]), $2 ON CONFLICT (tag) "
                "DO UPDATE SET added_at = coalesce(tags.added_at, excluded.added_at), retired_at = NULL",
                wanted,
                at,
            )
        return len(wanted) - active

    async def retire_tags(self, ids: Sequence[str], at: float) -> int:
        async with self._acquire() as con:
            st = await con.execute(
                "UPDATE tags SET retired_at = $1 WHERE tag = ANY($2::text[]) AND "
                "added_at IS NOT NULL AND retired_at IS NULL",
                at,
                sorted(set(ids)),
            )
        return _count(st)

    async def list_tags(self, include_retired: bool = False) -> list[str]:
        where = "added_at IS NOT NULL" + ("" if include_retired else " AND retired_at IS NULL")
        return [r[0] for r in await self._fetch(f"SELECT tag FROM tags WHERE {where} ORDER BY tag")]

    # -- ingest ------------------------------------------------------------------------------------------

    async def _intern_tags(self, con: asyncpg.Connection, names: set[str]) -> dict[str, int]:
        missing = sorted(names - self._tag_ids.keys())
        if missing:
            # Its own short autocommit statement, outside the batch transaction: interned names are
            # harmless if the batch later fails, and no lock on a tags row is held across a COPY.
            # Sorted so two collectors interning overlapping sets take row locks in one order.
            await con.execute(
                "INSERT INTO tags (tag) SELECT unnest($1::text[]) ON CONFLICT (tag) DO NOTHING", missing
            )
            self._tag_ids.update(
                (r["tag"], r["id"])
                for r in await con.fetch("SELECT tag, id FROM tags WHERE tag = ANY($1::text[])", missing)
            )
        return self._tag_ids

    async def _ensure_days(self, con: asyncpg.Connection, days: Iterable[int]) -> int:
        """Create the readings partitions of ``days`` that do not exist; returns how many it made.

        Its own short transaction (never inside a batch's: the DDL locks ``readings`` whole until
        commit). Collectors doing this at once take turns on an advisory lock, so CREATE ... IF NOT EXISTS
        sees the other's committed partition instead of racing it on the catalog.

        Raises:
            OverflowError: a day outside the years 1 to 9999 (no name for it).
            asyncpg.LockNotAvailableError: ``readings`` stayed locked past `DDL_LOCK_TIMEOUT_S`.
        """
        missing = sorted(set(days) - self._days)
        if not missing:
            return 0
        names = {d: partition_name(d) for d in missing}
        timeout_ms = round(min(self._lock_timeout_s, DDL_LOCK_TIMEOUT_S) * 1000)
        async with con.transaction():
            await con.execute(f"SET LOCAL lock_timeout = {timeout_ms}")
            await con.execute("SELECT pg_advisory_xact_lock($1)", lock_key("readings_days", self.lock_scope))
            have = await _partition_days(con)
            made = [d for d in missing if d not in have]
            for d in made:
                await con.execute(
                    f'CREATE TABLE IF NOT EXISTS "{names[d]}" PARTITION OF readings '
                    f"FOR VALUES FROM ({d * DAY_SECONDS!r}) TO ({(d + 1) * DAY_SECONDS!r})"
                )
        self._days |= have.keys() | set(made)
        if made:
            log.info("readings_partitions_created", partitions=[names[d] for d in made])
        return len(made)

    async def ingest(self, batch: IngestBatch) -> IngestResult:
        b = batch
        offset_dd = check_batch(b)
        days = {
            int(d) for d in np.unique(np.floor(np.asarray(b.t_collector, dtype=np.float64) / DAY_SECONDS))
        }
        async with self._acquire() as con:
            bid = await self._board_id(con, b.board)
            try:
                # Inside the try: a name the server or the driver cannot take refuses this batch (400).
                tag_ids = await self._intern_tags(con, batch_tag_names(b))
                await self._ensure_days(con, days)
                try:
                    return await self._store(con, b, bid, tag_ids, offset_dd)
                except asyncpg.CheckViolationError as e:
                    # No partition for a row's day (that error names no constraint): another collector's
                    # retention dropped a day this process still counted on. The batch rolled back
                    # whole; make the day again and store it once more.
                    if e.constraint_name:
                        raise
                    self._days -= days
                await self._ensure_days(con, days)
                return await self._store(con, b, bid, tag_ids, offset_dd)
            except OverflowError as e:  # partition_name: no calendar day for that time
                raise BadBatch("t_collector", f"a reading outside the years 1 to 9999 ({e})") from e
            except (asyncpg.IntegrityConstraintViolationError, asyncpg.DataError) as e:
                field = constraint_field(
                    getattr(e, "constraint_name", None) or getattr(e, "column_name", None) or ""
                )
                raise BadBatch(
                    field,
                    f"refused by the database ({type(e).__name__}: {e}) in batch {b.board}/{b.epoch}/{b.seq}",
                ) from e

    async def _store(
        self, con: asyncpg.Connection, b: IngestBatch, bid: int, tag_ids: dict[str, int], offset_dd: int
    ) -> IngestResult:
        """Store one batch: its common case in one statement (`_STORE_NEXT`), anything that statement
        does not take (it then changed nothing) by the general path (`_store_batch`). One operation with
        one outcome either way; the statement is only the round trips the common case can skip."""
        if b.gap is None and not b.telemetry:
            readings = [_as_grid(col) for col in _reading_columns(b, tag_ids)]
            head = batch_row(b, bid, offset_dd)[:8]
            if b.clock is None:
                stored = await con.fetchval(_STORE_NEXT, *head, *readings)
            else:
                s = b.clock
                stored = await con.fetchval(
                    _STORE_NEXT_WITH_SAMPLE, *head, *readings, s.boot, s.t1, s.t2, s.t3, s.t4
                )
            if stored is not None:
                return IngestResult(IngestStatus.STORED, b.digest)
        return await self._store_batch(con, b, bid, tag_ids, offset_dd)

    async def _store_batch(
        self, con: asyncpg.Connection, b: IngestBatch, bid: int, tag_ids: dict[str, int], offset_dd: int
    ) -> IngestResult:
        """The batch's one transaction: clock sample, header, seq accounting, readings, telemetry, counters."""
        gap = b.gap or {}
        async with con.transaction():
            # The board's row first, as on every path (the sample's statement locks it too).
            if b.clock is not None:
                # Kept whatever the batch turns out to be, in its transaction: one commit.
                await _insert_clock_sample(con, bid, b.clock)
            else:
                await con.execute(_LOCK_BOARD, bid)
            row = batch_row(b, bid, offset_dd)
            done = False
            if b.gap is None:  # the next seq here too (a batch with telemetry): span and counts at once
                batch_id, done = await con.fetchrow(_STORE_NEXT_BATCH, *row, 0)
            else:
                batch_id = await con.fetchval(_INSERT_BATCH, *row)
            if batch_id is None:
                stored = await con.fetchval(
                    "SELECT digest FROM batches WHERE board_id = $1 AND epoch = $2 AND seq = $3",
                    bid,
                    b.epoch,
                    b.seq,
                )
                status = IngestStatus.DUPLICATE if stored == b.digest else IngestStatus.CONFLICT
                return IngestResult(status, stored)
            if not done:
                for epoch, lo, hi in seq_intervals(b):
                    await _account_seqs(con, bid, epoch, lo, hi)
                await con.execute(_COUNT_ONE_BATCH, b.n, gap.get("readings", 0), b.received_at, b.boot, bid)
            if b.n:
                t_collector, t_board_ms, tag_id, rssi_dd = _reading_columns(b, tag_ids)
                await con.copy_records_to_table(
                    "readings",
                    schema_name=self.schema,
                    columns=READING_COPY_COLUMNS,
                    records=zip(t_collector, t_board_ms, repeat(batch_id), tag_id, repeat(bid), rssi_dd),
                )
            if b.telemetry:
                await con.executemany(
                    "INSERT INTO telemetry (batch_id, board_id, tag_id, at, t_board_ms, battery_mv, "
                    "temperature_c, adv_count, uptime_s) VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9)",
                    [
                        (
                            batch_id,
                            bid,
                            tag_ids[t["tag"]],
                            b.received_at,
                            t["t_ms"],
                            *(None if t.get(k) is None else float(t[k]) for k in TELEMETRY_FIELDS),
                        )
                        for t in b.telemetry
                    ],
                )
        return IngestResult(IngestStatus.STORED, b.digest)

    async def board_counts(self) -> list[BoardCounts]:
        rows = await self._fetch(
            "SELECT name, readings_total, batches_total, last_batch_at, gap_readings, last_boot "
            "FROM boards ORDER BY name"
        )
        return [BoardCounts(*r) for r in rows]

    async def latest_telemetry(self, tags: Sequence[str] | None = None) -> dict[str, TagTelemetry]:
        where, args = "", []
        if tags is not None:
            where = "WHERE tag_id IN (SELECT id FROM tags WHERE tag = ANY($1::text[]))"
            args.append(list(tags))
        rows = await self._fetch(LATEST_TELEMETRY_SQL.format(where=where), *args)
        return {r[0]: TagTelemetry(*r) for r in rows}

    async def seq_holes(self, board: str | None = None, *, unreported: bool = False) -> list[SeqHole]:
        cond, args = ("", ()) if board is None else ("AND b.name = $1", (board,))
        # "NOT h.reported" as the partial index seq_holes_open has it.
        sql = SEQ_HOLES_SQL.format(board=cond, open="AND NOT h.reported" if unreported else "")
        rows = await self._fetch(sql, *args)
        return [SeqHole(*r[:4], tail=bool(r[4])) for r in rows]

    async def mark_holes_reported(self, holes: Sequence[SeqHole]) -> None:
        if not holes:
            return
        async with self._acquire() as con, con.transaction():
            await con.executemany(
                "UPDATE seq_holes SET reported = true WHERE board_id = (SELECT id FROM boards WHERE name = $1) "
                "AND epoch = $2 AND first_seq = $3 AND last_seq = $4",
                [(h.board, h.epoch, h.first_seq, h.last_seq) for h in holes],
            )

    # -- clock, heartbeats, events -----------------------------------------------------------------------

    async def add_clock_sample(self, sample: ClockSample) -> None:
        s = sample
        check_clock_sample(s)
        async with self._acquire() as con, con.transaction():
            await _insert_clock_sample(con, await self._board_id(con, s.board), s)

    async def clock_samples(self, board: str, boot: str, since: float | None = None) -> list[ClockSample]:
        rows = await self._fetch(
            "SELECT t1, t2, t3, t4 FROM clock_samples WHERE board_id = (SELECT id FROM boards WHERE name = $1) "
            "AND boot = $2 AND t2 >= $3 ORDER BY t2, id",
            board,
            boot,
            -math.inf if since is None else since,
        )
        return [ClockSample(board, boot, *r) for r in rows]

    async def add_heartbeat(self, hb: Heartbeat, clock: ClockSample | None = None) -> None:
        if clock is not None:
            check_clock_sample(clock)
        stats = json.dumps(hb.stats, sort_keys=True)
        epoch, sealed = spool_mark(hb.stats) or (None, None)
        async with self._acquire() as con:
            bid = await self._board_id(con, hb.board)
            args = (bid, hb.at, hb.boot, stats, self._heartbeat_history - 1, epoch, sealed)
            if clock is None:
                found = await con.fetchval(_HEARTBEAT, *args)
            else:
                found = await con.fetchval(
                    _HEARTBEAT_WITH_SAMPLE, *args, clock.boot, clock.t1, clock.t2, clock.t3, clock.t4
                )
        if not found:
            raise ValueError(f"unknown board {hb.board!r}")

    async def heartbeats(self, board: str, since: float) -> list[Heartbeat]:
        rows = await self._fetch(
            "SELECT at, boot, stats FROM heartbeats WHERE board_id = "
            "(SELECT id FROM boards WHERE name = $1) AND at >= $2 ORDER BY at, id",
            board,
            since,
        )
        return [Heartbeat(board, r["at"], r["boot"], json.loads(r["stats"])) for r in rows]

    async def recent_heartbeats(self, since: float) -> dict[str, list[Heartbeat]]:
        # A range of heartbeats_at, in its order (at, then id): the rows of the window only, whatever the
        # history or the planner statistics; grouped by board here, each board's oldest first.
        rows = await self._fetch(
            "SELECT b.name, h.at, h.boot, h.stats FROM heartbeats h JOIN boards b ON b.id = h.board_id "
            "WHERE h.at >= $1 ORDER BY h.at, h.id",
            since,
        )
        out: dict[str, list[Heartbeat]] = {}
        for r in rows:
            name = r["name"]
            out.setdefault(name, []).append(Heartbeat(name, r["at"], r["boot"], json.loads(r["stats"])))
        return out

    async def latest_heartbeats(self) -> dict[str, Heartbeat]:
        # One backward step on heartbeats_board_at_id per board: the cost follows the number of boards,
        # not the history kept.
        rows = await self._fetch(
            "SELECT b.name, h.at, h.boot, h.stats FROM boards b CROSS JOIN LATERAL (SELECT k.at, k.boot, k.stats "
            "FROM heartbeats k WHERE k.board_id = b.id ORDER BY k.at DESC, k.id DESC LIMIT 1) h"
        )
        return {r["name"]: Heartbeat(r["name"], r["at"], r["boot"], json.loads(r["stats"])) for r in rows}

    async def add_event(self, event: Event, *, lead: str | None = None) -> int | None:
        async with self._acquire() as con, con.transaction():
            if lead is not None:
                await self._fence(con, lead)
            bid = None if event.board is None else await self._board_id(con, event.board)
            return await con.fetchval(
                "INSERT INTO events (at, board_id, kind, detail, key) VALUES ($1, $2, $3, $4, $5) "
                "ON CONFLICT (key) DO NOTHING RETURNING id",
                event.at,
                bid,
                event.kind,
                json.dumps(event.detail, sort_keys=True),
                event.key,
            )

    async def _fence(self, con: asyncpg.Connection, name: str) -> None:
        """Inside a write transaction: refuse unless lock ``name``'s term is still the one this process took.

        FOR SHARE makes a concurrent takeover (its term UPDATE) wait for this transaction, or this read
        wait for the takeover and see the new term: the write lands before the new leader starts, or not
        at all."""
        held = self._held.get(name)
        term = await con.fetchval("SELECT term FROM leases WHERE name = $1 FOR SHARE", name)
        if held is None or term != held[1]:
            mine = None if held is None else held[1]
            raise LeadershipLost(f"lock {name!r} is at term {term}, this collector's is {mine}")

    async def events(self, since_id: int = 0, limit: int = 1000, board: str | None = None) -> list[Event]:
        cond, args = "e.id > $1", [since_id, limit]
        if board is not None:
            cond += " AND e.board_id = (SELECT id FROM boards WHERE name = $3)"
            args.append(board)
        rows = await self._fetch(
            f"SELECT e.at, b.name, e.kind, e.detail, e.id FROM events e LEFT JOIN boards b "
            f"ON b.id = e.board_id WHERE {cond} ORDER BY e.id LIMIT $2",
            *args,
        )
        return [Event(r["at"], r["name"], r["kind"], json.loads(r["detail"]), r["id"]) for r in rows]

    # -- export and retention ----------------------------------------------------------------------------

    async def readings(
        self,
        t_from: float,
        t_to: float,
        boards: Sequence[str] | None = None,
        tags: Sequence[str] | None = None,
    ) -> ReadingRows:
        """Readings with ``t_from <= t_collector < t_to``, ordered by collector time (binary COPY, no row objects)."""
        cond, args = ["r.t_collector >= $1", "r.t_collector < $2"], [float(t_from), float(t_to)]
        if boards is not None:
            args.append(list(boards))
            cond.append(f"r.board_id IN (SELECT id FROM boards WHERE name = ANY(${len(args)}::text[]))")
        if tags is not None:
            args.append(list(tags))
            cond.append(f"r.tag_id IN (SELECT id FROM tags WHERE tag = ANY(${len(args)}::text[]))")
        sql = (
            f"SELECT r.board_id::int4, r.tag_id, r.t_collector, r.rssi_dd::int4, b.offset_dd::int4 "
            f"FROM readings r JOIN batches b ON b.id = r.batch_id WHERE {' AND '.join(cond)} "
            f"ORDER BY r.t_collector, r.board_id, r.tag_id"
        )
        buf = bytearray()

        async def sink(chunk: bytes) -> None:
            buf.extend(chunk)

        async with self._acquire() as con:
            await con.copy_from_query(sql, *args, output=sink, format="binary")
            arr = parse_copy_binary(buf)
            board_ids, board_inv = np.unique(arr["board_id"], return_inverse=True)
            tag_ids, tag_inv = np.unique(arr["tag_id"], return_inverse=True)
            board_names = dict(
                await con.fetch(
                    "SELECT id::int4, name FROM boards WHERE id = ANY($1::int4[])", board_ids.tolist()
                )
            )
            tag_names = dict(
                await con.fetch("SELECT id, tag FROM tags WHERE id = ANY($1::int4[])", tag_ids.tolist())
            )
        return ReadingRows(
            board=np.array([board_names[i] for i in board_ids.tolist()], dtype=object)[board_inv],
            tag=np.array([tag_names[i] for i in tag_ids.tolist()], dtype=object)[tag_inv],
            t_collector=arr["t_collector"].astype(np.float64),
            rssi_dd=arr["rssi_dd"].astype(np.int32),
            offset_dd=arr["offset_dd"].astype(np.int32),
        )

    async def scan_readings(
        self,
        t_from: float,
        t_to: float,
        sink: Callable[[ReadingChunk], None],
        boards: Sequence[str] | None = None,
        tags: Sequence[str] | None = None,
        chunk_rows: int = SCAN_CHUNK_ROWS,
    ) -> int:
        """
        `Store.scan_readings` as one binary ``COPY (SELECT ...) TO STDOUT``, cut into chunks as it arrives.

        No ``ORDER BY`` and no join, so the server streams rows as the scan finds them. Each chunk is
        parsed and handed to ``sink`` in a worker thread while the COPY waits (asyncpg reads no further
        until the sink returns), so at most one chunk is held. The COPY may run as long as it makes
        progress: it fails with `StoreUnavailable` when ``command_timeout_s`` passes without a byte, and
        is capped at `SCAN_MAX_SECONDS` in all. ``progress`` is rows so far over the planner's estimate.
        """
        if chunk_rows < 1:
            raise ValueError(f"chunk_rows: must be >= 1, got {chunk_rows!r}")
        loop = asyncio.get_running_loop()
        async with self._acquire() as con, con.transaction(isolation="repeatable_read", readonly=True):
            # One snapshot for the names and the rows.
            board_names = {int(i): n for i, n in await con.fetch("SELECT id::int8, name FROM boards")}
            tag_names = {int(i): n for i, n in await con.fetch("SELECT id::int8, tag FROM tags")}
            offsets = OffsetChanges([tuple(r) for r in await con.fetch(OFFSET_CHANGES_SQL)])
            cond, args = ["t_collector >= $1", "t_collector < $2"], [float(t_from), float(t_to)]
            for col, names, wanted in (("board_id", board_names, boards), ("tag_id", tag_names, tags)):
                if wanted is not None:
                    keep = set(wanted)
                    args.append([i for i, n in names.items() if n in keep])
                    cond.append(f"{col} = ANY(${len(args)}::int8[])")
            sql = (
                f"SELECT board_id::int4, tag_id::int4, t_collector, rssi_dd::int4, batch_id::int8 FROM readings "
                f"WHERE {' AND '.join(cond)}"
            )
            plan = await con.fetchval(f"EXPLAIN (FORMAT JSON) {sql}", *args)
            estimate = float((json.loads(plan) if isinstance(plan, str) else plan)[0]["Plan"]["Plan Rows"])
            chunks = _CopyChunks(chunk_rows)
            total = 0
            last_data = [loop.time()]  # when the server last sent bytes or the sink last returned
            in_sink = [False]  # time in the sink (a slow consumer) is not a stalled server

            def deliver(body: bytes) -> int:
                rows = _parse_scan_rows(body)
                done = total + len(rows)
                sink(
                    ReadingChunk(
                        rows["board_id"].astype(np.int64),
                        rows["tag_id"].astype(np.int64),
                        rows["t_collector"].astype(np.float64),
                        rows["rssi_dd"].astype(np.int32),
                        board_names,
                        tag_names,
                        min(1.0, done / estimate) if estimate > 0 else None,
                        offsets.lookup(rows["board_id"].astype(np.int64), rows["batch_id"].astype(np.int64)),
                    )
                )
                return len(rows)

            async def output(data: bytes) -> None:
                nonlocal total
                last_data[0] = loop.time()
                for body in chunks.feed(data):
                    in_sink[0] = True
                    try:
                        total += await asyncio.to_thread(deliver, body)
                    finally:
                        in_sink[0] = False
                        last_data[0] = loop.time()

            copy = asyncio.ensure_future(
                con.copy_from_query(sql, *args, output=output, format="binary", timeout=SCAN_MAX_SECONDS)
            )
            try:
                while not copy.done():
                    idle = 0.0 if in_sink[0] else loop.time() - last_data[0]
                    if idle >= self._command_timeout_s:
                        copy.cancel()
                        raise StoreUnavailable(
                            f"PostgreSQL sent no export rows for {self._command_timeout_s:g} s"
                        )
                    await asyncio.wait({copy}, timeout=self._command_timeout_s - idle)
                await copy
            finally:
                if not copy.done():
                    copy.cancel()
                    with contextlib.suppress(BaseException):
                        await copy
            tail = chunks.finish()
            if tail:
                total += await asyncio.to_thread(deliver, tail)
        return total

    async def ensure_reading_days(self, t_from: float, t_to: float) -> int:
        """Create the day partitions of ``readings`` for every UTC day from ``t_from``'s to ``t_to``'s.

        Returns how many were made. ``readings`` locked past `DDL_LOCK_TIMEOUT_S` (a long export, say)
        makes none and says so in the log: the next pass tries again, and ingest makes a missing day
        itself."""
        if not (math.isfinite(t_from) and math.isfinite(t_to)) or t_to < t_from:
            raise ValueError(f"need finite t_from <= t_to, got {t_from!r}, {t_to!r}")
        async with self._acquire() as con:
            try:
                return await self._ensure_days(con, range(reading_day(t_from), reading_day(t_to) + 1))
            except asyncpg.LockNotAvailableError as e:
                log.warning("readings_partitions_busy", t_from=t_from, t_to=t_to, error=str(e))
                return 0

    async def delete_readings_before(
        self, t: float, chunk: int = 10_000, max_chunks: int | None = None
    ) -> int:
        """`Store.delete_readings_before` by days: every partition wholly before ``t`` is detached and
        dropped (its rows counted exactly first; at most ``max_chunks`` days per call, like the chunks),
        then the rows before ``t`` in the one day that straddles it go in chunks. Telemetry keeps its
        chunked delete: one row per tag report, not per reading."""
        check_chunks(chunk, max_chunks)
        if not math.isfinite(t):
            raise ValueError(f"t: must be finite, got {t!r}")
        cut_day = reading_day(t)
        async with self._acquire() as con:
            leftover = [
                r[0]
                for r in await con.fetch(
                    "SELECT relname FROM pg_class WHERE relnamespace = current_schema()::regnamespace "
                    "AND relkind = 'r' AND relname LIKE $1 ORDER BY relname",
                    f"readings\\_%{_DROPPING}",
                )
                if _day_of(r[0].removesuffix(_DROPPING)) is not None
            ]
            days = await _partition_days(con)
        self._days = set(days)
        dropped = 0
        total = 0
        # Days a drop detached but did not get to drop (the process stopped, or a reader held the table):
        # nothing reads or writes them any more, so they go first, counted like the rest.
        for name in leftover:
            total += await self._count_and_drop(name)
        for day in sorted(d for d in days if d < cut_day)[:max_chunks]:
            name = days[day]
            if not await self._detach(name):
                break
            self._days.discard(day)
            total += await self._count_and_drop(name + _DROPPING)
            dropped += 1
        straddling = days.get(cut_day)

        async def delete_chunk(table: str, col: str) -> int:
            if table == "readings":
                if straddling is None:
                    return 0
                # One partition by name: ctids are unique only within a partition.
                table = f'"{straddling}"'
            # One short statement per chunk (autocommit): no giant transaction, no long row locks.
            async with self._acquire() as con:
                st = await con.execute(
                    f"DELETE FROM {table} WHERE ctid = ANY(ARRAY(SELECT ctid FROM {table} "
                    f"WHERE {col} < $1 LIMIT $2))",
                    t,
                    chunk,
                )
            return _count(st)

        total += await delete_in_chunks(delete_chunk, chunk, max_chunks)
        log.info(
            "readings_deleted",
            backend="postgres",
            before=t,
            readings=total,
            partitions_dropped=dropped + len(leftover),
            chunk=chunk,
            max_chunks=max_chunks,
        )
        return total

    async def _detach(self, name: str) -> bool:
        """Take day ``name`` out of ``readings`` and rename it for its drop; False if ``readings`` stayed
        locked past `DDL_LOCK_TIMEOUT_S` (nothing changed; the next pass tries again).

        From the commit on, no insert can reach the table (a late reading of that day makes a new
        partition, which a later pass drops), so the count taken before the drop is exact."""
        timeout_ms = round(min(self._lock_timeout_s, DDL_LOCK_TIMEOUT_S) * 1000)
        async with self._acquire() as con:
            try:
                async with con.transaction():
                    await con.execute(f"SET LOCAL lock_timeout = {timeout_ms}")
                    await con.execute(f'ALTER TABLE readings DETACH PARTITION "{name}"')
                    await con.execute(f'ALTER TABLE "{name}" RENAME TO "{name}{_DROPPING}"')
            except asyncpg.LockNotAvailableError as e:
                log.warning("readings_partition_busy", partition=name, error=str(e))
                return False
        return True

    async def _count_and_drop(self, table: str) -> int:
        """Count a detached day's rows and drop it, in one transaction; returns the count."""
        async with self._acquire() as con, con.transaction():
            n = int(await con.fetchval(f'SELECT count(*) FROM "{table}"', timeout=DROP_COUNT_MAX_SECONDS))
            await con.execute(f'DROP TABLE "{table}"')
        log.info("readings_partition_dropped", partition=table.removesuffix(_DROPPING), readings=n)
        return n

    async def delete_history_before(
        self,
        *,
        heartbeats: float | None = None,
        clock_samples: float | None = None,
        batches: float | None = None,
        chunk: int = 10_000,
        max_chunks: int | None = None,
    ) -> dict[str, int]:
        async def delete_chunk(table: str, cut: float) -> int:
            async with self._acquire() as con:
                st = await con.execute(
                    f"DELETE FROM {table} WHERE ctid = ANY(ARRAY(SELECT x.ctid FROM {table} x "
                    f"WHERE {HISTORY_TABLES[table].format(cut='$1')} LIMIT $2))",
                    cut,
                    chunk,
                )
            return _count(st)

        cuts = {"heartbeats": heartbeats, "clock_samples": clock_samples, "batches": batches}
        done = await delete_history_in_chunks(delete_chunk, cuts, chunk, max_chunks)
        log.info("history_deleted", backend="postgres", chunk=chunk, max_chunks=max_chunks, **done)
        return done

    @contextlib.asynccontextmanager
    async def exclusive(self, name: str) -> AsyncIterator[bool]:
        """Session advisory lock ``name`` on one pooled connection, held for the block, released after."""
        key = lock_key(name, self.lock_scope)
        async with self._acquire() as con:
            self._lock_sessions.add(con.get_server_pid())  # before the lock may exist: reset in full
            if not await con.fetchval("SELECT pg_try_advisory_lock($1)", key):
                yield False
                return
            try:
                term = await con.fetchval(
                    "INSERT INTO leases (name, term, holder) VALUES ($1, 1, $2) ON CONFLICT (name) "
                    "DO UPDATE SET term = leases.term + 1, holder = $2, taken_at = now() RETURNING term",
                    name,
                    self._holder,
                )
                self._held[name] = (con, term)
                log.info("lock_taken", name=name, term=term, schema=self.lock_scope)
                yield True
            finally:
                self._held.pop(name, None)
                await self._unlock(con, key, name)

    async def _unlock(self, con: asyncpg.Connection, key: int, name: str) -> None:
        """Release within ``lock_timeout_s``; otherwise close the session (the server then frees its locks)."""
        try:
            await asyncio.wait_for(con.fetchval("SELECT pg_advisory_unlock($1)", key), self._lock_timeout_s)
        except BaseException as e:
            # Dead session, no answer in time, or cancelled meanwhile: never hand a connection that may
            # still hold the lock back to the pool. terminate() itself refuses on a session asyncpg already
            # dropped, which is just as released.
            with contextlib.suppress(Exception):
                con.terminate()
            if not isinstance(e, Exception):
                raise  # a cancellation stays a cancellation
            log.warning("lock_release_failed", name=name, error=f"{type(e).__name__}: {e}")

    async def watch_baselines(self) -> dict[str, WatchBaseline]:
        rows = await self._fetch(
            f"SELECT b.name, {WATCH_COLS} FROM watch_baselines w JOIN boards b ON b.id = w.board_id"
        )
        return {r[0]: watch_from_row(r[0], tuple(r)[1:]) for r in rows}

    async def set_watch_baselines(self, baselines: Sequence[WatchBaseline]) -> None:
        async with self._acquire() as con, con.transaction():
            rows = [(await self._board_id(con, w.board), *watch_row(w)) for w in baselines]
            await con.executemany(
                f"INSERT INTO watch_baselines (board_id, {WATCH_COLS}) VALUES ($1, $2, $3, $4, $5, $6) "
                "ON CONFLICT (board_id) DO UPDATE SET marker = excluded.marker, "
                "baseline_from = excluded.baseline_from, levels = excluded.levels, "
                "shift_since = excluded.shift_since, raised = excluded.raised",
                rows,
            )

    async def holds(self, name: str) -> bool:
        held = self._held.get(name)
        if held is None:
            return False
        con, term = held
        try:
            # An answer from the lock's own session proves the session (and so its lock) is alive; the
            # term proves nobody took the lock since.
            now = await asyncio.wait_for(
                con.fetchval("SELECT term FROM leases WHERE name = $1", name), self._lock_timeout_s
            )
        except Exception as e:
            # Any failure to get an answer on the lock's own session (a killed session can also leave
            # asyncpg's protocol mid-operation: InternalClientError) means the lock cannot be proven held.
            log.warning("lock_lost", name=name, term=term, error=f"{type(e).__name__}: {e}")
            return False
        if now != term:
            log.warning("lock_lost", name=name, term=term, current_term=now)
            return False
        return True


def _reading_columns(
    b: IngestBatch, tag_ids: dict[str, int]
) -> tuple[list[float], list[int], list[int], list[int]]:
    """A batch's readings as the column lists both ingest paths send: t_collector, t_board_ms, tag id, rssi_dd.

    Raises:
        BadBatch: a value its column's type cannot hold (the driver would refuse it before any CHECK
            constraint could name the field).
    """
    try:
        t_board_ms = np.asarray(b.t_board_ms, dtype=np.int64)
    except OverflowError as e:
        raise BadBatch("t_board_ms", f"must fit a 64-bit integer ({e})") from e
    try:
        rssi_dd = np.asarray(b.rssi_dd, dtype=np.int64)
    except OverflowError as e:
        raise BadBatch("rssi_dd", f"must fit a 16-bit integer ({e})") from e
    if rssi_dd.size and not (_INT16_MIN <= rssi_dd.min() and rssi_dd.max() <= _INT16_MAX):
        raise BadBatch("rssi_dd", f"must fit a 16-bit integer, got {rssi_dd.min()}..{rssi_dd.max()}")
    return (
        np.asarray(b.t_collector, dtype=np.float64).tolist(),
        t_board_ms.tolist(),
        reading_tag_ids(b, tag_ids),
        rssi_dd.tolist(),
    )


_GRID_WIDTH = 64


def _as_grid(col: list[Any]) -> list[list[Any]]:
    """A column as a 2-D array parameter: rows of `_GRID_WIDTH`, the last one padded with NULLs.

    asyncpg tests every element of a 1-D list for nesting (an ABC isinstance each, costlier than encoding
    the element), but of a 2-D list only the rows and the first row's elements. ``unnest`` reads it back
    in order; the statement drops the padding."""
    pad = -len(col) % _GRID_WIDTH
    if pad:
        col = col + [None] * pad
    return [col[i : i + _GRID_WIDTH] for i in range(0, len(col), _GRID_WIDTH)]


async def _insert_clock_sample(con: asyncpg.Connection, board_id: int, s: ClockSample) -> None:
    """The sample, and its boot as the board's latest if no later contact says otherwise: one statement,
    which locks the board's row whatever the times (a batch's first lock, `_LOCK_BOARD`)."""
    await con.execute(
        f"WITH board AS ({_LOCK_BOARD}), "
        "s AS (INSERT INTO clock_samples (board_id, boot, t1, t2, t3, t4) VALUES ($1, $2, $3, $4, $5, $6)) "
        "UPDATE boards SET last_boot = $2, last_boot_at = $4 WHERE id = $1 AND EXISTS (SELECT FROM board) "
        "AND (last_boot_at IS NULL OR last_boot_at <= $4)",
        board_id,
        s.boot,
        s.t1,
        s.t2,
        s.t3,
        s.t4,
    )


async def _account_seqs(con: asyncpg.Connection, board_id: int, epoch: str, lo: int, hi: int) -> None:
    """Fold the covered range [lo, hi] into the (board, epoch)'s span and holes (common.cover_seqs).

    The span row is locked first (FOR UPDATE), so two collectors storing batches of one epoch at once
    apply their ranges one after the other; ranges are taken in sorted order (common.seq_intervals)."""
    if await con.fetchval(
        "INSERT INTO seq_reach (board_id, epoch, first_seq, reach) VALUES ($1, $2, $3, $4) "
        "ON CONFLICT (board_id, epoch) DO NOTHING RETURNING 1",
        board_id,
        epoch,
        lo,
        hi,
    ):
        return
    first, reach = await con.fetchrow(
        "SELECT first_seq, reach FROM seq_reach WHERE board_id = $1 AND epoch = $2 FOR UPDATE",
        board_id,
        epoch,
    )
    if lo == reach + 1:  # the common case: the next seq, right after the span
        await con.execute(
            "UPDATE seq_reach SET reach = $3 WHERE board_id = $1 AND epoch = $2", board_id, epoch, hi
        )
        return
    old: list[tuple[int, int, bool]] = []
    if lo <= reach and hi >= first:  # a late batch or a gap record inside the span: it may fill holes
        old = [
            (r[0], r[1], r[2])
            for r in await con.fetch(
                "SELECT first_seq, last_seq, reported FROM seq_holes WHERE board_id = $1 AND epoch = $2 "
                "AND first_seq <= $3 AND last_seq >= $4",
                board_id,
                epoch,
                hi,
                lo,
            )
        ]
    first, reach, new = cover_seqs(first, reach, lo, hi, [(a, b) for a, b, _ in old])
    if old:
        await con.execute(
            "DELETE FROM seq_holes WHERE board_id = $1 AND epoch = $2 AND first_seq = ANY($3::bigint[])",
            board_id,
            epoch,
            [a for a, _, _ in old],
        )
    if new:
        await con.executemany(
            "INSERT INTO seq_holes (board_id, epoch, first_seq, last_seq, reported) VALUES ($1, $2, $3, $4, $5)",
            [(board_id, epoch, a, b, r) for (a, b), r in zip(new, pieces_reported(old, new), strict=True)],
        )
    await con.execute(
        "UPDATE seq_reach SET first_seq = $3, reach = $4 WHERE board_id = $1 AND epoch = $2",
        board_id,
        epoch,
        first,
        reach,
    )
