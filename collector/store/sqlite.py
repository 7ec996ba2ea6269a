"""
The embedded store: one SQLite file in WAL mode.

Threads, so the event loop never blocks on the disk:

- one **writer** thread owns the only writing connection; every write runs there, in submission order;
- one **reader** thread owns a second connection; WAL lets it read while the writer commits.

Ingest uses **group commit**: batches that arrive while a commit is running wait in a queue and are
written together in the next transaction; a batch the database refuses is rolled back alone while the
others in its group are kept (`SqliteStore._write_items`). Every caller's future resolves only after
the group's COMMIT returned with ``synchronous=FULL`` (the WAL is fsynced on every commit). One fsync per
group instead of one per batch is what lets a hundred boards share one SD card or disk. Heartbeats join
the same queue: a group of heartbeats alone commits without the fsync, as heartbeats
always did (the next one replaces what a crash loses); one among batches is as durable as they are.

A write lock held elsewhere past ``busy_timeout_s``, a full disk or an I/O error → `StoreUnavailable`.
One collector per SQLite file: `exclusive` is an in-process lock.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import math
import os
import sqlite3
from collections import deque
from collections.abc import AsyncIterator, Callable, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from itertools import chain, islice, repeat
from pathlib import Path
from typing import Any, TypeVar

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
    StoreError,
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
    SEQ_HOLES_SQL,
    TELEMETRY_FIELDS,
    WATCH_COLS,
    OffsetChanges,
    batch_row,
    batch_tag_names,
    board_from_row,
    calibration_from_row,
    check_batch,
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
from listenpost.collector.store.migrations import migrate_sqlite

log = structlog.get_logger("listenpost.collector.store.sqlite")
_INSERT_BATCH = (
    f"INSERT INTO batches ({', '.join(BATCH_COLS)}) VALUES ({', '.join('?' * len(BATCH_COLS))}) "
    "ON CONFLICT (board_id, epoch, seq) DO NOTHING"
)
T = TypeVar("T")

# Result codes that mean "the storage cannot do it now", not "this request is wrong".
_UNAVAILABLE = {
    "SQLITE_BUSY",
    "SQLITE_LOCKED",
    "SQLITE_FULL",
    "SQLITE_IOERR",
    "SQLITE_CANTOPEN",
    "SQLITE_READONLY",
    "SQLITE_PROTOCOL",
    "SQLITE_NOMEM",
    "SQLITE_PERM",
    "SQLITE_NOLFS",
}

_READING_DTYPE = np.dtype(
    [
        ("board_id", np.int64),
        ("tag_id", np.int64),
        ("t_collector", np.float64),
        ("rssi_dd", np.int32),
        ("offset_dd", np.int32),
    ]
)


# What `scan_readings` reads per row: no join; the batch id gives the applied offset (`OffsetChanges`).
_SCAN_DTYPE = np.dtype(
    [
        ("board_id", np.int64),
        ("tag_id", np.int64),
        ("t_collector", np.float64),
        ("rssi_dd", np.int32),
        ("batch_id", np.int64),
    ]
)


def _unavailable(e: sqlite3.Error) -> bool:
    name = getattr(e, "sqlite_errorname", "") or ""
    base = "_".join(name.split("_")[:2])  # SQLITE_IOERR_FSYNC -> SQLITE_IOERR
    return base in _UNAVAILABLE or "locked" in str(e)


class SqliteStore:
    """
    The `Store` on one SQLite file.

    Attributes:
        url: ``sqlite:///<path>``.
        path: the database file.
        ingest_commits: how many group transactions ingest has committed (≤ batches ingested).
        ingest_batches: how many batches went through those commits (stored, duplicate, conflict or refused).
    """

    def __init__(
        self,
        path: Path,
        *,
        busy_timeout_s: float,
        heartbeat_history: int,
        max_group_batches: int,
        max_group_readings: int,
    ) -> None:
        self.path = path
        self.url = f"sqlite:///{path}"
        self.ingest_commits = 0
        self.ingest_batches = 0
        self._busy_timeout_s = busy_timeout_s
        self._heartbeat_history = heartbeat_history
        self._max_group_batches = max_group_batches
        self._max_group_readings = max_group_readings
        self._wexec = ThreadPoolExecutor(1, thread_name_prefix="lp-sqlite-writer")
        self._rexec = ThreadPoolExecutor(1, thread_name_prefix="lp-sqlite-reader")
        self._wcon: sqlite3.Connection | None = None
        self._rcon: sqlite3.Connection | None = None
        self._closed = False
        self._pending: deque[tuple[IngestBatch | _HeartbeatWrite, asyncio.Future[Any]]] = deque()
        self._flusher: asyncio.Task[None] | None = None
        self._locks: dict[str, asyncio.Lock] = {}
        # name -> id caches; boards and tags are never deleted, so ids never change. The tag cache is
        # touched by the writer thread only.
        self._board_ids: dict[str, int] = {}
        self._tag_ids: dict[str, int] = {}

    # -- life cycle ------------------------------------------------------------------------------------

    @classmethod
    async def open(
        cls,
        path: str | Path,
        *,
        busy_timeout_s: float = 5.0,
        heartbeat_history: int = 2880,
        max_group_batches: int = 512,
        max_group_readings: int = 500_000,
    ) -> SqliteStore:
        """
        Open (create, migrate) the store in ``path``.

        Args:
            path: the database file; its directory must exist.
            busy_timeout_s: how long a write waits for a lock held by another connection before
                `StoreUnavailable`, seconds.
            heartbeat_history: heartbeats kept per board (2880 = one day at 30 s).
            max_group_batches / max_group_readings: bounds on one group commit.

        Raises:
            StoreUnavailable: the file cannot be opened or written.
            SchemaTooNew: the file was migrated by a newer listenpost.
            StoreError: the file is not a listenpost database SQLite can read.
        """
        if busy_timeout_s <= 0 or heartbeat_history < 1 or max_group_batches < 1 or max_group_readings < 1:
            raise ValueError(
                "busy_timeout_s, heartbeat_history, max_group_batches and max_group_readings must be positive"
            )
        store = cls(
            Path(path),
            busy_timeout_s=busy_timeout_s,
            heartbeat_history=heartbeat_history,
            max_group_batches=max_group_batches,
            max_group_readings=max_group_readings,
        )
        try:
            await store._write(store._open_writer)
            await store._read(store._open_reader)
        except BaseException:
            await store._shutdown()
            raise
        log.info("store_opened", backend="sqlite", path=str(store.path))
        return store

    def _connect(self) -> sqlite3.Connection:
        con = sqlite3.connect(
            self.path, isolation_level=None, timeout=self._busy_timeout_s, check_same_thread=True
        )
        con.execute(f"PRAGMA busy_timeout = {int(self._busy_timeout_s * 1000)}")
        return con

    def _open_writer(self) -> None:
        # Create the file owner-only before SQLite does (it would apply the umask, often 0644); SQLite
        # gives the -wal and -shm files the mode of the database file.
        with contextlib.suppress(OSError):  # unopenable: sqlite3 below reports it as before
            os.close(os.open(self.path, os.O_RDWR | os.O_CREAT, 0o600))
        con = self._connect()
        try:
            mode = con.execute("PRAGMA journal_mode = WAL").fetchone()[0]
            if mode.lower() != "wal":
                raise StoreError(f"{self.path}: cannot switch to WAL mode (journal_mode is {mode!r})")
            # FULL: in WAL mode this fsyncs the WAL on every commit, so a 200 means durable.
            con.execute("PRAGMA synchronous = FULL")
            con.execute("PRAGMA foreign_keys = ON")
            migrate_sqlite(con)
            self._board_ids.update(con.execute("SELECT name, id FROM boards").fetchall())
        except BaseException:
            con.close()
            raise
        self._wcon = con

    def _open_reader(self) -> None:
        con = self._connect()
        con.execute("PRAGMA query_only = ON")
        self._rcon = con

    async def close(self) -> None:
        """Finish queued ingests, then close both connections."""
        if self._closed:
            return
        self._closed = True
        if self._flusher is not None:
            with contextlib.suppress(Exception):
                await self._flusher
        await self._shutdown()
        log.info("store_closed", backend="sqlite", path=str(self.path))

    async def _shutdown(self) -> None:
        loop = asyncio.get_running_loop()

        def close_w() -> None:
            if self._wcon is not None:
                self._wcon.close()
                self._wcon = None

        def close_r() -> None:
            if self._rcon is not None:
                self._rcon.close()
                self._rcon = None

        await loop.run_in_executor(self._wexec, close_w)
        await loop.run_in_executor(self._rexec, close_r)
        self._wexec.shutdown(wait=False)
        self._rexec.shutdown(wait=False)

    # -- thread plumbing -------------------------------------------------------------------------------

    async def _run(self, executor: ThreadPoolExecutor, fn: Callable[..., T], *args: Any) -> T:
        def guarded() -> T:
            try:
                return fn(*args)
            except sqlite3.Error as e:
                if _unavailable(e):
                    raise StoreUnavailable(f"{self.path}: {e}") from e
                if isinstance(e, sqlite3.DatabaseError) and not isinstance(
                    e, sqlite3.IntegrityError | sqlite3.OperationalError
                ):
                    raise StoreError(f"{self.path}: {e}") from e
                raise

        return await asyncio.get_running_loop().run_in_executor(executor, guarded)

    async def _write(self, fn: Callable[..., T], *args: Any) -> T:
        return await self._run(self._wexec, fn, *args)

    async def _read(self, fn: Callable[..., T], *args: Any) -> T:
        return await self._run(self._rexec, fn, *args)

    def _check_open(self) -> None:
        if self._closed:
            raise StoreUnavailable(f"{self.path}: store is closed")

    async def _wtx(self, fn: Callable[[sqlite3.Connection], T], *, durable: bool = True) -> T:
        """
        Run ``fn(con)`` in one write transaction on the writer thread. Not ``durable``: the commit does
        not fsync the WAL (``synchronous=NORMAL``); the next durable commit's fsync covers it.
        """
        self._check_open()

        def job() -> T:
            con = self._wcon
            assert con is not None
            if not durable:
                con.execute("PRAGMA synchronous = NORMAL")  # only outside a transaction
            try:
                con.execute("BEGIN IMMEDIATE")
                try:
                    out = fn(con)
                    con.execute("COMMIT")
                    return out
                except BaseException:
                    if con.in_transaction:
                        con.execute("ROLLBACK")
                    raise
            finally:
                if not durable:
                    con.execute("PRAGMA synchronous = FULL")

        return await self._write(job)

    async def _query(self, sql: str, params: Sequence[Any] = ()) -> list[Any]:
        self._check_open()

        def job() -> list[Any]:
            assert self._rcon is not None
            return self._rcon.execute(sql, params).fetchall()

        return await self._read(job)

    def _board_id(self, con: sqlite3.Connection, name: str) -> int:
        bid = self._board_ids.get(name)
        if bid is None:
            row = con.execute("SELECT id FROM boards WHERE name = ?", (name,)).fetchone()
            if row is None:
                raise ValueError(f"unknown board {name!r}")
            bid = self._board_ids[name] = row[0]
        return bid

    # -- boards and enrollment -------------------------------------------------------------------------

    async def add_board(self, board: Board, enrollment: Enrollment) -> None:
        if enrollment.board != board.name:
            raise ValueError(f"enrollment.board {enrollment.board!r} is not the new board {board.name!r}")

        def tx(con: sqlite3.Connection) -> None:
            try:
                cur = con.execute(
                    f"INSERT INTO boards ({BOARD_COLS}) VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
                    (
                        board.name,
                        board.room,
                        board.floor,
                        board.created_at,
                        board.enrolled_at,
                        json_text(board.fingerprint),
                        board.offset_db,
                        board.retired_at,
                    ),
                )
            except sqlite3.IntegrityError as e:
                raise ValueError(f"board {board.name!r} already exists") from e
            con.execute(
                "INSERT INTO enrollments (code_hash, board_id, expires_at, used_at) VALUES (?, ?, ?, ?)",
                (enrollment.code_hash, cur.lastrowid, enrollment.expires_at, enrollment.used_at),
            )

        await self._wtx(tx)

    async def get_board(self, name: str) -> Board | None:
        rows = await self._query(f"SELECT {BOARD_COLS} FROM boards WHERE name = ?", (name,))
        return board_from_row(rows[0]) if rows else None

    async def list_boards(self, include_retired: bool = True) -> list[Board]:
        where = "" if include_retired else "WHERE retired_at IS NULL"
        return [
            board_from_row(r)
            for r in await self._query(f"SELECT {BOARD_COLS} FROM boards {where} ORDER BY name")
        ]

    async def retire_board(self, name: str, at: float) -> bool:
        def tx(con: sqlite3.Connection) -> bool:
            cur = con.execute(
                "UPDATE boards SET retired_at = ? WHERE name = ? AND retired_at IS NULL", (at, name)
            )
            return cur.rowcount == 1

        return await self._wtx(tx)

    async def new_enrollment(self, enrollment: Enrollment) -> None:
        def tx(con: sqlite3.Connection) -> None:
            bid = self._board_id(con, enrollment.board)
            # Older unused codes stop working: a re-flash invalidates whatever was printed before.
            con.execute("DELETE FROM enrollments WHERE board_id = ? AND used_at IS NULL", (bid,))
            con.execute(
                "INSERT INTO enrollments (code_hash, board_id, expires_at, used_at) VALUES (?, ?, ?, ?)",
                (enrollment.code_hash, bid, enrollment.expires_at, enrollment.used_at),
            )

        await self._wtx(tx)

    async def get_enrollment(self, code_hash: str) -> Enrollment | None:
        rows = await self._query(
            "SELECT b.name, e.code_hash, e.expires_at, e.used_at FROM enrollments e "
            "JOIN boards b ON b.id = e.board_id WHERE e.code_hash = ?",
            (code_hash,),
        )
        return Enrollment(*rows[0]) if rows else None

    async def complete_enrollment(
        self, code_hash: str, token_hash: str, fingerprint: dict[str, Any], at: float
    ) -> Board:
        def tx(con: sqlite3.Connection) -> Board:
            row = con.execute(
                "SELECT board_id, expires_at, used_at FROM enrollments WHERE code_hash = ?", (code_hash,)
            ).fetchone()
            if row is None:
                raise EnrollmentRefused(EnrollmentReason.UNKNOWN)
            bid, expires_at, used_at = row
            if used_at is not None:
                raise EnrollmentRefused(EnrollmentReason.USED)
            if at > expires_at:
                raise EnrollmentRefused(EnrollmentReason.EXPIRED)
            con.execute("UPDATE enrollments SET used_at = ? WHERE code_hash = ?", (at, code_hash))
            # A re-enrolled board gets a new token; the old one stops matching.
            con.execute(
                "UPDATE boards SET token_hash = ?, fingerprint = ?, enrolled_at = ? WHERE id = ?",
                (token_hash, json_text(fingerprint), at, bid),
            )
            return board_from_row(
                con.execute(f"SELECT {BOARD_COLS} FROM boards WHERE id = ?", (bid,)).fetchone()
            )

        return await self._wtx(tx)

    async def board_for_token(self, token_hash: str) -> Board | None:
        rows = await self._query(f"SELECT {BOARD_COLS} FROM boards WHERE token_hash = ?", (token_hash,))
        return board_from_row(rows[0]) if rows else None

    async def set_offset(self, calibration: Calibration) -> None:
        c = calibration

        def tx(con: sqlite3.Connection) -> None:
            bid = self._board_id(con, c.board)
            con.execute(
                "INSERT INTO calibrations (board_id, at, offset_db, spread_db, samples, reference_tag, "
                "distance_m, fingerprint) VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
                (
                    bid,
                    c.at,
                    c.offset_db,
                    c.spread_db,
                    c.samples,
                    c.reference_tag,
                    c.distance_m,
                    json_text(c.fingerprint),
                ),
            )
            con.execute("UPDATE boards SET offset_db = ? WHERE id = ?", (c.offset_db, bid))

        await self._wtx(tx)

    async def calibrations(self, board: str) -> list[Calibration]:
        rows = await self._query(
            "SELECT b.name, c.at, c.offset_db, c.spread_db, c.samples, c.reference_tag, c.distance_m, c.fingerprint "
            "FROM calibrations c JOIN boards b ON b.id = c.board_id WHERE b.name = ? ORDER BY c.at, c.id",
            (board,),
        )
        return [calibration_from_row(r) for r in rows]

    # -- tags --------------------------------------------------------------------------------------------

    async def add_tags(self, ids: Sequence[str], at: float) -> int:
        wanted = sorted(set(ids))

        def tx(con: sqlite3.Connection) -> int:
            active = {
                r[0]
                for r in con.execute(
                    "SELECT tag FROM tags WHERE added_at IS NOT NULL AND retired_at IS NULL "
                    "AND tag IN (SELECT value FROM json_each(?))",
                    (json.dumps(wanted),),
                )
            }
            con.executemany(
                "INSERT INTO tags (tag, added_at) VALUES (?, ?) ON CONFLICT (tag) DO UPDATE SET "
                "added_at = coalesce(tags.added_at, excluded.added_at), retired_at = NULL",
                [(t, at) for t in wanted],
            )
            return len(wanted) - len(active)

        return await self._wtx(tx)

    async def retire_tags(self, ids: Sequence[str], at: float) -> int:
        def tx(con: sqlite3.Connection) -> int:
            cur = con.execute(
                "UPDATE tags SET retired_at = ? WHERE added_at IS NOT NULL AND retired_at IS NULL "
                "AND tag IN (SELECT value FROM json_each(?))",
                (at, json.dumps(sorted(set(ids)))),
            )
            return cur.rowcount

        return await self._wtx(tx)

    async def list_tags(self, include_retired: bool = False) -> list[str]:
        where = "added_at IS NOT NULL" + ("" if include_retired else " AND retired_at IS NULL")
        return [r[0] for r in await self._query(f"SELECT tag FROM tags WHERE {where} ORDER BY tag")]

    # -- ingest ------------------------------------------------------------------------------------------

    async def ingest(self, batch: IngestBatch) -> IngestResult:
        self._check_open()
        check_batch(batch)
        return await self._enqueue(batch)  # type: ignore[no-any-return]

    async def _enqueue(self, item: IngestBatch | _HeartbeatWrite) -> Any:
        """Queue ``item`` for the next group commit; its outcome once the group's COMMIT returned."""
        fut: asyncio.Future[Any] = asyncio.get_running_loop().create_future()
        # A caller cancelled while its group commits never reads the outcome; mark it retrieved.
        fut.add_done_callback(lambda f: f.cancelled() or f.exception())
        self._pending.append((item, fut))
        if self._flusher is None or self._flusher.done():
            self._flusher = asyncio.create_task(self._flush(), name="sqlite-group-commit")
        return await asyncio.shield(fut)

    async def _flush(self) -> None:
        """Write queued batches and heartbeats group by group until the queue is empty."""
        while self._pending:
            group: list[tuple[IngestBatch | _HeartbeatWrite, asyncio.Future[Any]]] = []
            readings = 0
            while (
                self._pending
                and len(group) < self._max_group_batches
                and (not group or readings + self._pending[0][0].n <= self._max_group_readings)
            ):
                item = self._pending.popleft()
                readings += item[0].n
                group.append(item)
            try:
                results = await self._write(self._write_group, [b for b, _ in group])
            except BaseException as e:  # the whole group failed to commit: nobody's batch is stored
                err = e if isinstance(e, Exception) else StoreUnavailable(f"{self.path}: {e!r}")
                for _, fut in group:
                    if not fut.done():
                        fut.set_exception(err)
                if not isinstance(e, Exception):
                    raise
                continue
            for (_, fut), res in zip(group, results, strict=True):
                if fut.done():
                    continue
                if isinstance(res, BaseException):
                    fut.set_exception(res)
                else:
                    fut.set_result(res)

    def _write_group(self, items: list[IngestBatch | _HeartbeatWrite]) -> list[Any]:
        con = self._wcon
        if con is None:
            raise StoreUnavailable(f"{self.path}: store is closed")
        batches = sum(isinstance(x, IngestBatch) for x in items)
        if not batches:
            con.execute(
                "PRAGMA synchronous = NORMAL"
            )  # heartbeats alone: no fsync (only outside a transaction)
        try:
            try:
                results = self._write_items(con, items, careful=False)
            except _ItemRefused:
                results = self._write_items(con, items, careful=True)
        finally:
            if not batches:
                con.execute("PRAGMA synchronous = FULL")
        if batches:
            self.ingest_commits += 1
            self.ingest_batches += batches
        return results

    def _write_items(
        self, con: sqlite3.Connection, items: list[IngestBatch | _HeartbeatWrite], *, careful: bool
    ) -> list[Any]:
        """
        One transaction for the group. Every statement releases the GIL, and the writer then waits for the
        request handlers to hand it back, so the writer sends as few statements as it can: the group's
        readings and clock samples go in shared multi-row INSERTs, not per batch, and no item has a
        savepoint of its own.
        If the database refuses anything of one item, the group is rolled back (`_ItemRefused`) and
        written again ``careful``: each item inside its own SAVEPOINT with its own rows, so the item
        refused is answered and rolled back alone. Only the storage failing (disk full, I/O error, lock)
        fails the group.
        """
        con.execute("BEGIN IMMEDIATE")
        new_tags: dict[str, int] = {}
        rows = _Buffered()
        try:
            results: list[Any] = []
            for x in items:
                if careful:
                    con.execute("SAVEPOINT item")
                try:
                    mine: dict[str, int] = {}
                    if isinstance(x, IngestBatch):
                        mine = self._intern_tags(con, batch_tag_names(x) - new_tags.keys())
                        tag_ids = self._tag_ids | new_tags | mine if new_tags or mine else self._tag_ids
                        result = self._insert_batch(con, x, tag_ids, rows)
                    else:
                        result = self._insert_heartbeat(con, x, rows)
                    rows.insert(con, whole=careful)
                    if careful:
                        con.execute("RELEASE item")
                    new_tags |= mine
                    results.append(result)
                except Exception as e:
                    if isinstance(e, sqlite3.Error) and not isinstance(
                        e, sqlite3.IntegrityError | sqlite3.DataError
                    ):
                        raise
                    if not careful:
                        raise _ItemRefused from e
                    con.execute("ROLLBACK TO item")
                    con.execute("RELEASE item")
                    rows.clear()
                    results.append(_refusal(x, e) if isinstance(x, IngestBatch) else e)
            try:
                rows.insert(con, whole=True)
            except (sqlite3.IntegrityError, sqlite3.DataError) as e:
                raise _ItemRefused from e
            con.execute("COMMIT")
        except BaseException:
            if con.in_transaction:
                with contextlib.suppress(sqlite3.Error):
                    con.execute("ROLLBACK")
            raise
        self._tag_ids.update(new_tags)
        return results

    def _intern_tags(self, con: sqlite3.Connection, names: set[str]) -> dict[str, int]:
        """Ids for tags this process has not cached yet (inserted unregistered if new)."""
        missing = sorted(names - self._tag_ids.keys())
        if not missing:
            return {}
        con.executemany(
            "INSERT INTO tags (tag) VALUES (?) ON CONFLICT (tag) DO NOTHING", [(t,) for t in missing]
        )
        # Each name bound as itself: a round trip through SQLite's JSON text does not give every string
        # back unchanged (one with a NUL came back as another string, so its id was missing).
        ids = {t: con.execute("SELECT id FROM tags WHERE tag = ?", (t,)).fetchone()[0] for t in missing}
        return ids

    def _insert_batch(
        self, con: sqlite3.Connection, b: IngestBatch, tag_ids: dict[str, int], rows: _Buffered
    ) -> IngestResult:
        """Store one batch; its readings and clock sample are left in ``rows`` for the caller to insert."""
        offset_dd = check_batch(b)
        bid = self._board_id(con, b.board)
        if b.clock is not None:
            # The exchange is a measurement of its own, kept whatever the batch turns out to be (stored,
            # duplicate, conflict), in the batch's transaction: one commit, and gone with a refused batch.
            rows.samples.extend(_sample_row(bid, b.clock))
        cur = con.execute(_INSERT_BATCH, batch_row(b, bid, offset_dd))
        if not cur.rowcount:  # (board, epoch, seq) is stored already
            if b.clock is not None:
                _note_boot(con, bid, b.clock.boot, b.clock.t2)
            (stored,) = con.execute(
                "SELECT digest FROM batches WHERE board_id = ? AND epoch = ? AND seq = ?",
                (bid, b.epoch, b.seq),
            ).fetchone()
            return IngestResult(
                IngestStatus.DUPLICATE if stored == b.digest else IngestStatus.CONFLICT, stored
            )
        batch_id = cur.lastrowid
        for epoch, lo, hi in seq_intervals(b):
            _account_seqs(con, bid, epoch, lo, hi)
        if b.n:
            rows.readings.extend(
                chain.from_iterable(
                    zip(
                        repeat(batch_id),
                        repeat(bid),
                        reading_tag_ids(b, tag_ids),
                        np.asarray(b.t_board_ms, dtype=np.int64).tolist(),
                        np.asarray(b.t_collector, dtype=np.float64).tolist(),
                        np.asarray(b.rssi_dd, dtype=np.int64).tolist(),
                    )
                )
            )
        if b.telemetry:
            con.executemany(
                "INSERT INTO telemetry (batch_id, board_id, tag_id, at, t_board_ms, battery_mv, temperature_c, "
                "adv_count, uptime_s) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
                [
                    (
                        batch_id,
                        bid,
                        tag_ids[t["tag"]],
                        b.received_at,
                        t["t_ms"],
                        *(t.get(k) for k in TELEMETRY_FIELDS),
                    )
                    for t in b.telemetry
                ],
            )
        con.execute(
            "UPDATE boards SET readings_total = readings_total + ?, batches_total = batches_total + 1, "
            "gap_readings = gap_readings + ?, last_batch_at = max(coalesce(last_batch_at, ?), ?), "
            + _CONTACT_BOOT
            + " WHERE id = ?",
            (
                b.n,
                (b.gap or {}).get("readings", 0),
                b.received_at,
                b.received_at,
                *_contact(b.clock, b.boot, b.received_at),
                bid,
            ),
        )
        return IngestResult(IngestStatus.STORED, b.digest)

    async def board_counts(self) -> list[BoardCounts]:
        rows = await self._query(
            "SELECT name, readings_total, batches_total, last_batch_at, gap_readings, last_boot "
            "FROM boards ORDER BY name"
        )
        return [BoardCounts(*r) for r in rows]

    async def latest_telemetry(self, tags: Sequence[str] | None = None) -> dict[str, TagTelemetry]:
        where, params = "", []
        if tags is not None:
            where = "WHERE tag_id IN (SELECT id FROM tags WHERE tag IN (SELECT value FROM json_each(?)))"
            params.append(json.dumps(list(tags)))
        rows = await self._query(LATEST_TELEMETRY_SQL.format(where=where), params)
        return {r[0]: TagTelemetry(*r) for r in rows}

    async def seq_holes(self, board: str | None = None, *, unreported: bool = False) -> list[SeqHole]:
        cond, params = ("", ()) if board is None else ("AND b.name = ?", (board, board))
        # "h.reported = 0" as the partial index seq_holes_open has it, so SQLite uses that index.
        sql = SEQ_HOLES_SQL.format(board=cond, open="AND h.reported = 0" if unreported else "")
        rows = await self._query(sql, params)
        return [SeqHole(*r[:4], tail=bool(r[4])) for r in rows]

    async def mark_holes_reported(self, holes: Sequence[SeqHole]) -> None:
        def tx(con: sqlite3.Connection) -> None:
            con.executemany(
                "UPDATE seq_holes SET reported = 1 WHERE board_id = (SELECT id FROM boards WHERE name = ?) "
                "AND epoch = ? AND first_seq = ? AND last_seq = ?",
                [(h.board, h.epoch, h.first_seq, h.last_seq) for h in holes],
            )

        if holes:
            await self._wtx(tx)

    # -- clock, heartbeats, events -----------------------------------------------------------------------

    async def add_clock_sample(self, sample: ClockSample) -> None:
        s = sample
        check_clock_sample(s)

        def tx(con: sqlite3.Connection) -> None:
            _insert_clock_sample(con, self._board_id(con, s.board), s)

        await self._wtx(tx)

    async def clock_samples(self, board: str, boot: str, since: float | None = None) -> list[ClockSample]:
        rows = await self._query(
            "SELECT t1, t2, t3, t4 FROM clock_samples WHERE board_id = (SELECT id FROM boards WHERE name = ?) "
            "AND boot = ? AND t2 >= ? ORDER BY t2, id",
            (board, boot, -math.inf if since is None else since),
        )
        return [ClockSample(board, boot, *r) for r in rows]

    async def add_heartbeat(self, hb: Heartbeat, clock: ClockSample | None = None) -> None:
        self._check_open()
        if clock is not None:
            check_clock_sample(clock)
        # Serialised here, on the event loop: the writer thread's time is what ingest waits on.
        await self._enqueue(
            _HeartbeatWrite(hb, clock, json.dumps(hb.stats, sort_keys=True), spool_mark(hb.stats))
        )

    def _insert_heartbeat(self, con: sqlite3.Connection, w: _HeartbeatWrite, rows: _Buffered) -> None:
        hb = w.heartbeat
        bid = self._board_id(con, hb.board)
        if w.clock is not None:
            rows.samples.extend(_sample_row(bid, w.clock))
        con.execute(
            "INSERT INTO heartbeats (board_id, at, boot, stats) VALUES (?, ?, ?, ?)",
            (bid, hb.at, hb.boot, w.stats_json),
        )
        con.execute(
            "DELETE FROM heartbeats WHERE id IN (SELECT id FROM heartbeats WHERE board_id = ? "
            "ORDER BY at DESC, id DESC LIMIT -1 OFFSET ?)",
            (bid, self._heartbeat_history),
        )
        # The board's boot (of the clock sample, then of the heartbeat) and spool epoch: one statement.
        epoch, sealed = w.spool_mark if w.spool_mark is not None else (None, None)
        con.execute(
            "UPDATE boards SET " + _CONTACT_BOOT + ", "
            "spool_epoch = CASE WHEN ? IS NOT NULL AND (spool_epoch_at IS NULL OR spool_epoch_at <= ?) "
            "THEN ? ELSE spool_epoch END, "
            "spool_epoch_at = CASE WHEN ? IS NOT NULL AND (spool_epoch_at IS NULL OR spool_epoch_at <= ?) "
            "THEN ? ELSE spool_epoch_at END WHERE id = ?",
            (*_contact(w.clock, hb.boot, hb.at), epoch, hb.at, epoch, epoch, hb.at, hb.at, bid),
        )
        if sealed is not None:
            _note_announced(con, bid, epoch, sealed)

    async def heartbeats(self, board: str, since: float) -> list[Heartbeat]:
        rows = await self._query(
            "SELECT at, boot, stats FROM heartbeats WHERE board_id = "
            "(SELECT id FROM boards WHERE name = ?) AND at >= ? ORDER BY at, id",
            (board, since),
        )
        return [Heartbeat(board, at, boot, json.loads(stats)) for at, boot, stats in rows]

    async def recent_heartbeats(self, since: float) -> dict[str, list[Heartbeat]]:
        # A range of heartbeats_at, in its order (at, then id): the rows of the window only, whatever the
        # history or the planner statistics; grouped by board here, each board's oldest first.
        rows = await self._query(
            "SELECT b.name, h.at, h.boot, h.stats FROM heartbeats h JOIN boards b ON b.id = h.board_id "
            "WHERE h.at >= ? ORDER BY h.at, h.id",
            (since,),
        )
        out: dict[str, list[Heartbeat]] = {}
        for name, at, boot, stats in rows:
            out.setdefault(name, []).append(Heartbeat(name, at, boot, json.loads(stats)))
        return out

    async def latest_heartbeats(self) -> dict[str, Heartbeat]:
        # One index probe per board (heartbeats_board_at ends in the rowid, so "at DESC, id DESC" is its
        # order): the cost follows the number of boards, not the history kept.
        rows = await self._query(
            "SELECT b.name, h.at, h.boot, h.stats FROM boards b JOIN heartbeats h ON h.id = "
            "(SELECT k.id FROM heartbeats k WHERE k.board_id = b.id ORDER BY k.at DESC, k.id DESC LIMIT 1)"
        )
        return {name: Heartbeat(name, at, boot, json.loads(stats)) for name, at, boot, stats in rows}

    async def add_event(self, event: Event, *, lead: str | None = None) -> int | None:
        # One collector per file and an in-process lock: the fence is that this process holds ``lead``.
        if lead is not None and not await self.holds(lead):
            raise LeadershipLost(f"lock {lead!r} is not held by this collector")

        def tx(con: sqlite3.Connection) -> int | None:
            bid = None if event.board is None else self._board_id(con, event.board)
            cur = con.execute(
                "INSERT INTO events (at, board_id, kind, detail, key) VALUES (?, ?, ?, ?, ?) "
                "ON CONFLICT (key) DO NOTHING",
                (event.at, bid, event.kind, json.dumps(event.detail, sort_keys=True), event.key),
            )
            return cur.lastrowid if cur.rowcount == 1 else None  # 0: an event with this key is stored

        return await self._wtx(tx)

    async def events(self, since_id: int = 0, limit: int = 1000, board: str | None = None) -> list[Event]:
        cond, params = "e.id > ?", [since_id]
        if board is not None:
            cond += " AND e.board_id = (SELECT id FROM boards WHERE name = ?)"
            params.append(board)
        rows = await self._query(
            f"SELECT e.at, b.name, e.kind, e.detail, e.id FROM events e LEFT JOIN boards b "
            f"ON b.id = e.board_id WHERE {cond} ORDER BY e.id LIMIT ?",
            [*params, limit],
        )
        return [Event(at, name, kind, json.loads(detail), id_) for at, name, kind, detail, id_ in rows]

    # -- export and retention ----------------------------------------------------------------------------

    async def readings(
        self,
        t_from: float,
        t_to: float,
        boards: Sequence[str] | None = None,
        tags: Sequence[str] | None = None,
    ) -> ReadingRows:
        """Readings with ``t_from <= t_collector < t_to``, ordered by collector time."""
        self._check_open()
        cond, params = ["r.t_collector >= ?", "r.t_collector < ?"], [t_from, t_to]
        if boards is not None:
            cond.append(
                "r.board_id IN (SELECT id FROM boards WHERE name IN (SELECT value FROM json_each(?)))"
            )
            params.append(json.dumps(list(boards)))
        if tags is not None:
            cond.append("r.tag_id IN (SELECT id FROM tags WHERE tag IN (SELECT value FROM json_each(?)))")
            params.append(json.dumps(list(tags)))
        sql = (
            f"SELECT r.board_id, r.tag_id, r.t_collector, r.rssi_dd, b.offset_dd FROM readings r "
            f"JOIN batches b ON b.id = r.batch_id WHERE {' AND '.join(cond)} "
            f"ORDER BY r.t_collector, r.board_id, r.tag_id"
        )

        def job() -> ReadingRows:
            con = self._rcon
            assert con is not None
            # A read transaction: the rows and the id -> name maps come from one snapshot.
            con.execute("BEGIN")
            try:
                arr = np.fromiter(con.execute(sql, params), dtype=_READING_DTYPE)
                board_names = _names(con, "SELECT id, name FROM boards", arr["board_id"])
                tag_names = _names(
                    con,
                    "SELECT id, tag FROM tags WHERE id IN (SELECT value FROM json_each(?))",
                    arr["tag_id"],
                    by_ids=True,
                )
            finally:
                con.execute("COMMIT")
            return ReadingRows(
                board_names,
                tag_names,
                arr["t_collector"].copy(),
                arr["rssi_dd"].astype(np.int32),
                arr["offset_dd"].astype(np.int32),
            )

        return await self._read(job)

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
        `Store.scan_readings` on a connection and thread of its own, so the shared reader stays free.

        Rows come in time order straight from the ``readings_t`` index (no sort, no join: the applied
        offsets come from the few rows where a board's offset changed), so ``progress`` is how far into the range the last row of a chunk is. One read
        transaction holds the snapshot; in WAL mode it never blocks the writer (the WAL cannot be
        checkpointed past it until the scan ends).
        """
        self._check_open()
        if chunk_rows < 1:
            raise ValueError(f"chunk_rows: must be >= 1, got {chunk_rows!r}")
        stop = [False]

        def job() -> int:
            con = self._connect()
            try:
                con.execute("PRAGMA query_only = ON")
                con.execute("BEGIN")  # the names and the rows from one snapshot
                board_names: dict[int, str] = dict(con.execute("SELECT id, name FROM boards"))
                tag_names: dict[int, str] = dict(con.execute("SELECT id, tag FROM tags"))
                offsets = OffsetChanges(con.execute(OFFSET_CHANGES_SQL).fetchall())
                cond, params = ["t_collector >= ?", "t_collector < ?"], [t_from, t_to]
                for col, names, wanted in (("board_id", board_names, boards), ("tag_id", tag_names, tags)):
                    if wanted is not None:
                        keep = set(wanted)
                        cond.append(f"{col} IN (SELECT value FROM json_each(?))")
                        params.append(json.dumps([i for i, n in names.items() if n in keep]))
                cur = con.execute(
                    f"SELECT board_id, tag_id, t_collector, rssi_dd, batch_id FROM readings WHERE {' AND '.join(cond)}",
                    params,
                )
                span = t_to - t_from
                total = 0
                while not stop[0]:
                    arr = np.fromiter(islice(cur, chunk_rows), dtype=_SCAN_DTYPE)
                    if not arr.size:
                        break
                    total += arr.size
                    t = arr["t_collector"]
                    progress = (
                        min(1.0, max(0.0, (float(t[-1]) - t_from) / span)) if math.isfinite(span) else None
                    )
                    sink(
                        ReadingChunk(
                            arr["board_id"],
                            arr["tag_id"],
                            t,
                            arr["rssi_dd"],
                            board_names,
                            tag_names,
                            progress,
                            offsets.lookup(arr["board_id"], arr["batch_id"]),
                        )
                    )
                return total
            finally:
                con.close()  # ends the read transaction

        executor = ThreadPoolExecutor(1, thread_name_prefix="lp-sqlite-scan")
        try:
            return await self._run(executor, job)
        finally:
            stop[0] = True  # a cancelled caller: the thread stops before its next chunk
            executor.shutdown(wait=False)

    async def ensure_reading_days(self, t_from: float, t_to: float) -> int:
        return 0  # one readings table: no day partitions to make

    async def delete_readings_before(
        self, t: float, chunk: int = 10_000, max_chunks: int | None = None
    ) -> int:
        async def delete_chunk(table: str, col: str) -> int:
            def tx(con: sqlite3.Connection) -> int:
                return con.execute(
                    f"DELETE FROM {table} WHERE rowid IN (SELECT rowid FROM {table} WHERE {col} < ? LIMIT ?)",
                    (t, chunk),
                ).rowcount

            # One short transaction per chunk: ingest groups get the writer between chunks.
            return await self._wtx(tx)

        total = await delete_in_chunks(delete_chunk, chunk, max_chunks)
        log.info(
            "readings_deleted", backend="sqlite", before=t, readings=total, chunk=chunk, max_chunks=max_chunks
        )
        return total

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
            sql = (
                f"DELETE FROM {table} WHERE rowid IN (SELECT x.rowid FROM {table} x "
                f"WHERE {HISTORY_TABLES[table].format(cut='?')} LIMIT ?)"
            )
            return await self._wtx(lambda con: con.execute(sql, (cut, chunk)).rowcount)

        cuts = {"heartbeats": heartbeats, "clock_samples": clock_samples, "batches": batches}
        done = await delete_history_in_chunks(delete_chunk, cuts, chunk, max_chunks)
        log.info("history_deleted", backend="sqlite", chunk=chunk, max_chunks=max_chunks, **done)
        return done

    @contextlib.asynccontextmanager
    async def exclusive(self, name: str) -> AsyncIterator[bool]:
        """In-process lock: one collector per SQLite file, so that is all the exclusion needed."""
        lock = self._locks.setdefault(name, asyncio.Lock())
        if lock.locked():
            yield False
            return
        async with lock:
            yield True

    async def watch_baselines(self) -> dict[str, WatchBaseline]:
        rows = await self._query(
            f"SELECT b.name, {WATCH_COLS} FROM watch_baselines w JOIN boards b ON b.id = w.board_id"
        )
        return {r[0]: watch_from_row(r[0], r[1:]) for r in rows}

    async def set_watch_baselines(self, baselines: Sequence[WatchBaseline]) -> None:
        def tx(con: sqlite3.Connection) -> None:
            con.executemany(
                f"INSERT OR REPLACE INTO watch_baselines (board_id, {WATCH_COLS}) VALUES (?, ?, ?, ?, ?, ?)",
                [(self._board_id(con, w.board), *watch_row(w)) for w in baselines],
            )

        await self._wtx(tx, durable=False)

    async def holds(self, name: str) -> bool:
        lock = self._locks.get(name)
        return lock is not None and lock.locked()


class _ItemRefused(Exception):
    """The database refused something of one item of a group written without savepoints."""


@dataclass(frozen=True, slots=True)
class _HeartbeatWrite:
    """A heartbeat (with the clock sample its request carried) queued for a group commit."""

    heartbeat: Heartbeat
    clock: ClockSample | None
    stats_json: str
    spool_mark: tuple[str, int | None] | None
    n: int = 0
    """Readings: none (the group bound counts readings)."""


def _refusal(b: IngestBatch, e: Exception) -> Exception:
    if isinstance(e, BadBatch):
        return e
    if not isinstance(e, sqlite3.IntegrityError):
        # A value the database or the driver cannot take (a string it cannot encode, an integer past 64
        # bits): a property of this batch, refused whole like a CHECK violation.
        return BadBatch(
            "batch", f"refused by the database ({type(e).__name__}: {e}) in {b.board}/{b.epoch}/{b.seq}"
        )
    # SQLite names the constraint: "CHECK constraint failed: rssi_dd_range".
    msg = str(e)
    field = constraint_field(msg.rsplit(":", 1)[-1].strip())
    return BadBatch(field, f"refused by the database ({msg}) in batch {b.board}/{b.epoch}/{b.seq}")


class _Rows:
    """
    Multi-row INSERTs of one table, for rows buffered as their column values, row after row, in a list.

    executemany steps (and releases and re-takes the GIL) once per row; under load the request handlers
    take the GIL at each of those releases, which doubled the writer's time per reading. One statement of
    up to 2048 rows steps once: with six columns 12,288 parameters, below SQLite's default limit of 32,766
    (since 3.32); older SQLite allowed only 999 parameters per statement, where 128 rows fit. Full
    chunks, then the remainder as powers of two: at most twelve statement texts per table, all of which
    stay in the connection's statement cache.
    """

    CHUNK = 2048 if sqlite3.sqlite_version_info >= (3, 32, 0) else 128

    def __init__(self, table: str, columns: tuple[str, ...]) -> None:
        self.cols = len(columns)
        head = f"INSERT INTO {table} ({', '.join(columns)}) VALUES "
        row = "(" + ", ".join("?" * self.cols) + ")"
        self.sql = {1 << i: head + ", ".join([row] * (1 << i)) for i in range(self.CHUNK.bit_length())}

    def insert(self, con: sqlite3.Connection, flat: list[Any], *, whole: bool) -> None:
        """Insert every full chunk of ``flat``, with ``whole`` the rest too, and take them out of it."""
        cols = self.cols
        step = self.CHUNK * cols
        done = 0
        while len(flat) - done >= step:
            con.execute(self.sql[self.CHUNK], flat[done : done + step])
            done += step
        if whole:
            left = (len(flat) - done) // cols
            while left:
                k = 1 << (left.bit_length() - 1)
                con.execute(self.sql[k], flat[done : done + k * cols])
                done += k * cols
                left -= k
        del flat[:done]


_READINGS = _Rows("readings", ("batch_id", "board_id", "tag_id", "t_board_ms", "t_collector", "rssi_dd"))
_SAMPLES = _Rows("clock_samples", ("board_id", "boot", "t1", "t2", "t3", "t4"))


@dataclass(slots=True)
class _Buffered:
    """What a group's items leave for multi-row INSERTs (`_Rows`): readings and clock samples."""

    readings: list[Any] = field(default_factory=list)
    samples: list[Any] = field(default_factory=list)

    def insert(self, con: sqlite3.Connection, *, whole: bool) -> None:
        _READINGS.insert(con, self.readings, whole=whole)
        _SAMPLES.insert(con, self.samples, whole=whole)

    def clear(self) -> None:
        self.readings.clear()
        self.samples.clear()


def _sample_row(board_id: int, s: ClockSample) -> tuple[Any, ...]:
    return (board_id, s.boot, s.t1, s.t2, s.t3, s.t4)


def _insert_clock_sample(con: sqlite3.Connection, board_id: int, s: ClockSample) -> None:
    """The sample and its boot on the board."""
    _SAMPLES.insert(con, list(_sample_row(board_id, s)), whole=True)
    _note_boot(con, board_id, s.boot, s.t2)


# A contact's boot on its board (`_note_boot` as of the contact's clock sample t2, then as of the contact
# itself), in one SET clause: every expression reads the row as it was, so the CASE first works out the
# boot time the sample leaves, max(last_boot_at, t2). Parameters from `_contact`.
_CONTACT_BOOT = (
    "last_boot = CASE WHEN max(coalesce(last_boot_at, ?), ?) <= ? THEN ? "
    "WHEN last_boot_at IS NULL OR last_boot_at <= ? THEN ? ELSE last_boot END, "
    "last_boot_at = max(coalesce(last_boot_at, ?), ?, ?)"
)


def _contact(clock: ClockSample | None, boot: str, at: float) -> tuple[Any, ...]:
    """`_CONTACT_BOOT`'s parameters for a contact at ``at`` in ``boot`` that carried ``clock``."""
    t2, sample_boot = (clock.t2, clock.boot) if clock is not None else (at, boot)
    return (t2, t2, at, boot, t2, sample_boot, t2, t2, at)


def _account_seqs(con: sqlite3.Connection, board_id: int, epoch: str, lo: int, hi: int) -> None:
    """Fold the covered range [lo, hi] into the (board, epoch)'s span and holes (common.cover_seqs)."""
    # The common case, the seq right after the span: one statement.
    if con.execute(
        "UPDATE seq_reach SET reach = ? WHERE board_id = ? AND epoch = ? AND reach = ?",
        (hi, board_id, epoch, lo - 1),
    ).rowcount:
        return
    row = con.execute(
        "SELECT first_seq, reach FROM seq_reach WHERE board_id = ? AND epoch = ?", (board_id, epoch)
    ).fetchone()
    if row is None:
        con.execute(
            "INSERT INTO seq_reach (board_id, epoch, first_seq, reach) VALUES (?, ?, ?, ?)",
            (board_id, epoch, lo, hi),
        )
        return
    first, reach = row
    old: list[tuple[int, int, bool]] = []
    if lo <= reach and hi >= first:  # a late batch or a gap record inside the span: it may fill holes
        old = [
            (a, b, bool(r))
            for a, b, r in con.execute(
                "SELECT first_seq, last_seq, reported FROM seq_holes WHERE board_id = ? AND epoch = ? "
                "AND first_seq <= ? AND last_seq >= ?",
                (board_id, epoch, hi, lo),
            )
        ]
    first, reach, new = cover_seqs(first, reach, lo, hi, [(a, b) for a, b, _ in old])
    con.executemany(
        "DELETE FROM seq_holes WHERE board_id = ? AND epoch = ? AND first_seq = ?",
        [(board_id, epoch, a) for a, _, _ in old],
    )
    con.executemany(
        "INSERT INTO seq_holes (board_id, epoch, first_seq, last_seq, reported) VALUES (?, ?, ?, ?, ?)",
        [(board_id, epoch, a, b, int(r)) for (a, b), r in zip(new, pieces_reported(old, new), strict=True)],
    )
    con.execute(
        "UPDATE seq_reach SET first_seq = ?, reach = ? WHERE board_id = ? AND epoch = ?",
        (first, reach, board_id, epoch),
    )


def _note_announced(con: sqlite3.Connection, board_id: int, epoch: str, sealed: int) -> None:
    """How far a heartbeat says its epoch's seqs reach (only an epoch some batch opened has a span)."""
    con.execute(
        "UPDATE seq_reach SET announced = max(coalesce(announced, -1), ?) WHERE board_id = ? AND epoch = ?",
        (sealed, board_id, epoch),
    )


def _note_boot(con: sqlite3.Connection, board_id: int, boot: str, at: float) -> None:
    con.execute(
        "UPDATE boards SET last_boot = ?, last_boot_at = ? WHERE id = ? AND "
        "(last_boot_at IS NULL OR last_boot_at <= ?)",
        (boot, at, board_id, at),
    )


def _names(con: sqlite3.Connection, sql: str, ids: np.ndarray, by_ids: bool = False) -> np.ndarray:
    """Map an id column to a str object column without a Python object per row beyond the result."""
    uniq, inverse = np.unique(ids, return_inverse=True)
    if not len(uniq):
        return np.empty(0, dtype=object)
    rows = con.execute(sql, (json.dumps(uniq.tolist()),) if by_ids else ()).fetchall()
    lookup = dict(rows)
    names = np.array([lookup[i] for i in uniq.tolist()], dtype=object)
    return names[inverse]
