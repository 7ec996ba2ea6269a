"""
The agent's durable spool: sealed batches in one SQLite file (WAL), oldest first.

Readings wait in memory at most ``flush_seconds``; then they are *sealed*: encoded with
`agent.wire.encode_content`, gzip'd, given the next ``seq`` of the spool's epoch and committed
with ``synchronous=FULL`` (one fsync per batch). One row per batch, never one per reading, to
spare SD cards. Everything else (ack deletes, dead letters) commits with ``synchronous=NORMAL``
and becomes durable with the next seal's fsync.

Keys and loss accounting (see RELIABILITY-NOTES.md §7.1):

- A batch is keyed by (board, epoch, seq). The epoch is a random 64-bit id (16 hex) made with the
  spool file; ``seq`` is assigned inside the seal transaction and never re-cut.
- Bounded in bytes: when a seal would pass ``max_bytes`` the oldest sealed batches go, and *gap
  records* (their own row and seq, reason ``spool_full``) name the dropped seq ranges and reading
  counts. A gap's ``gap`` object carries the ``epoch`` its range belongs to. A gap record that is
  itself dropped is folded into the new one, so gaps never pile up during a long outage.
- A batch the collector refuses (400/413) is moved to a bounded dead-letter table and a gap record
  (reason ``dead_letter``) says so.
- A corrupt file (bounded ``PRAGMA quick_check`` at open, or a corruption error later) is renamed
  to ``<path>.corrupt`` (at most one kept); readable batches are copied into a fresh spool under
  their old keys, the rest is reported by a gap record (reason ``spool_corrupt``) and a counter.
- Disk full or I/O errors: the connection is closed, readings stay in a hard-capped RAM buffer,
  ``degraded`` is set and the seal is retried on a capped, doubling timer.

SQLite calls run on one dedicated worker thread, so commits happen in call order and the event
loop never waits on the card. A cancelled caller does not abandon a half-applied operation: the
work runs to its end in a shielded task and its results are applied.

Gap record semantics: ``readings`` is exact; ``first_seq..last_seq`` may also span seqs that are
still spooled (a spool_full record names the envelope of one overflow's drops) or that were in flight
when dropped. The collector counts as lost only covered seqs it never receives.
"""

from __future__ import annotations

import asyncio
import concurrent.futures
import contextlib
import enum
import gzip
import hashlib
import json
import os
import secrets
import shutil
import sqlite3
import zlib
from collections import deque
from collections.abc import Awaitable, Callable, Iterable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, TypeVar

import structlog

from agent.clock import Clock
from agent.errors import SpoolError
from agent.types import Reading
from agent.wire import canonical_json, encode_content

log = structlog.get_logger(__name__)

T = TypeVar("T")

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

_CORRUPT_CODES = {11, 24, 26}  # SQLITE_CORRUPT, SQLITE_FORMAT, SQLITE_NOTADB (sqlite.org/rescode.html)
_SQLITE_HEADER = b"SQLite format 3\x00"  # sqlite.org/fileformat2.html §1.3

_SCHEMA = """
CREATE TABLE meta (key TEXT PRIMARY KEY, value TEXT NOT NULL) WITHOUT ROWID;
CREATE TABLE batches (
    id INTEGER PRIMARY KEY,
    epoch TEXT NOT NULL,
    seq INTEGER NOT NULL,
    digest TEXT NOT NULL,
    body BLOB NOT NULL,
    nbytes INTEGER NOT NULL,
    n_readings INTEGER NOT NULL,
    gap TEXT,
    boot TEXT NOT NULL,
    sealed_at_mono REAL NOT NULL,
    sealed_at_wall REAL NOT NULL,
    UNIQUE (epoch, seq)
);
CREATE TABLE dead_letters (
    id INTEGER PRIMARY KEY,
    epoch TEXT NOT NULL,
    seq INTEGER NOT NULL,
    digest TEXT NOT NULL,
    body BLOB NOT NULL,
    n_readings INTEGER NOT NULL,
    status INTEGER NOT NULL,
    reason TEXT NOT NULL,
    at_wall REAL NOT NULL
);
"""

_BODY_ERRORS = (OSError, EOFError, ValueError, zlib.error)
"""What a damaged gzip body raises on the way to its JSON (gzip.BadGzipFile is an OSError)."""

_COUNTERS = ("dropped_batches", "dropped_readings", "dead_letters", "corrupt_set_aside")


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
    """``agent.wire.digest(content)``: sha256 hex of the canonical content."""
    content: dict[str, Any]
    """``agent.wire.encode_content`` output (gap records included)."""
    n_readings: int
    """Readings in the batch (0 for a gap record)."""
    sealed_at_mono: float
    """Board monotonic time of the seal, seconds (of the boot the batch was sealed in)."""


@dataclass(frozen=True, slots=True)
class SpoolStats:
    """What the heartbeat and the health flag read."""

    batches: int
    """Sealed batches on disk, gap records included (acked ones leave within ``flush_seconds``)."""
    bytes: int
    """Compressed bodies plus `ROW_OVERHEAD_BYTES` per row, bytes."""
    readings_pending: int
    """Readings in memory, not yet sealed."""
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


# ------------------------------------------------------------------ worker-side values


@dataclass(frozen=True, slots=True)
class _Oldest:
    boot: str
    mono: float
    wall: float


@dataclass(frozen=True, slots=True)
class _Snapshot:
    """The disk state after an operation, handed from the worker thread to the event loop."""

    epoch: str
    next_seq: int
    batches: int
    bytes: int
    oldest: _Oldest | None
    counters: dict[str, int]
    degraded: bool


@dataclass(frozen=True, slots=True)
class _Interval:
    epoch: str
    first: int
    last: int
    readings: int
    unknown: bool = False


def _envelopes(intervals: Iterable[_Interval]) -> list[_Interval]:
    """
    One interval per epoch spanning all of ``intervals``; readings add up.

    A spool_full gap record names the *envelope* of what one overflow dropped, so the record count stays
    small however fragmented the drops are (each older gap record a drop folds in sits apart from the
    range it covers). The envelope may span seqs that are still spooled and will arrive; the collector
    counts as lost only covered seqs it never receives, and ``readings`` is exact.
    """
    by_epoch: dict[str, _Interval] = {}
    for iv in intervals:
        prev = by_epoch.get(iv.epoch)
        by_epoch[iv.epoch] = iv if prev is None else _Interval(
            iv.epoch, min(prev.first, iv.first), max(prev.last, iv.last), prev.readings + iv.readings,
            prev.unknown or iv.unknown)
    return sorted(by_epoch.values(), key=lambda i: (i.first, i.epoch))


class _Degraded(Exception):
    """The storage failed in a way a retry later may fix (disk full, I/O error, cannot open)."""


def _errcode(e: BaseException) -> int | None:
    code = getattr(e, "sqlite_errorcode", None)
    return code & 0xFF if isinstance(code, int) else None


def _is_corruption(e: BaseException) -> bool:
    if isinstance(e, _CorruptSpool):
        return True
    if isinstance(e, sqlite3.DatabaseError) and _errcode(e) in _CORRUPT_CODES:
        return True
    # Some corruption surfaces without an extended code (e.g. via the row decoder).
    return isinstance(e, sqlite3.DatabaseError) and not isinstance(e, sqlite3.OperationalError) and (
        "malformed" in str(e) or "not a database" in str(e))


class _CorruptSpool(Exception):
    """The file opens but is not a sound spool (failed check, wrong schema, unreadable meta)."""


def _compress(content: dict[str, Any]) -> tuple[bytes, str]:
    raw = canonical_json(content)
    # mtime=0: the same content always gives the same bytes.
    return gzip.compress(raw, compresslevel=GZIP_LEVEL, mtime=0), hashlib.sha256(raw).hexdigest()


@contextlib.contextmanager
def _transaction(conn: sqlite3.Connection, *, durable: bool) -> Iterator[None]:
    """
    One write transaction. ``durable`` commits with synchronous=FULL (the WAL is fsync'd at commit);
    otherwise NORMAL, which the next durable commit's fsync covers.
    """
    if durable:
        conn.execute("PRAGMA synchronous=FULL")
    try:
        conn.execute("BEGIN IMMEDIATE")
        try:
            yield
        except BaseException:
            if conn.in_transaction:
                try:
                    conn.execute("ROLLBACK")
                except sqlite3.Error:
                    pass  # the caller drops the connection anyway; keep the first error
            raise
        conn.execute("COMMIT")
    finally:
        if durable and not conn.in_transaction:
            try:
                conn.execute("PRAGMA synchronous=NORMAL")
            except sqlite3.Error:
                pass


def _fsync_dir(path: Path) -> None:
    """Make a rename in ``path`` durable (best effort: not every filesystem allows it)."""
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def _merge(intervals: Iterable[_Interval]) -> list[_Interval]:
    """Merge touching or overlapping seq intervals of the same epoch; readings add up."""
    out: list[_Interval] = []
    for iv in sorted(intervals, key=lambda i: (i.epoch, i.first, i.last)):
        if out and out[-1].epoch == iv.epoch and iv.first <= out[-1].last + 1:
            prev = out[-1]
            out[-1] = _Interval(prev.epoch, prev.first, max(prev.last, iv.last), prev.readings + iv.readings,
                                prev.unknown or iv.unknown)
        else:
            out.append(iv)
    return out


class _Disk:
    """
    The SQLite side of the spool. Used only from the spool's single worker thread.

    Methods raise `_Degraded` when the storage failed and the caller should keep its data in memory;
    corruption is handled here (set aside, fresh spool) and never escapes.
    """

    def __init__(self, path: Path, max_bytes: int, boot: str) -> None:
        self.path = path
        self.max_bytes = max_bytes
        self.boot = boot
        self.conn: sqlite3.Connection | None = None
        self.epoch = ""
        self.next_seq = 0
        self.batches = 0
        self.bytes = 0
        self.oldest: _Oldest | None = None
        self.counters = dict.fromkeys(_COUNTERS, 0)
        self.degraded = False

    # -------------------------------------------------------------- open / recover

    def snapshot(self) -> _Snapshot:
        return _Snapshot(self.epoch, self.next_seq, self.batches, self.bytes, self.oldest,
                         dict(self.counters), self.degraded)

    def open(self, mono: float, wall: float) -> None:
        """Open (or create, or recover) the spool file. Raises `_Degraded` if the storage fails."""
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            if self.path.exists() or self.path.is_symlink():
                try:
                    self._open_existing()
                except Exception as e:  # classified right here
                    if not _is_corruption(e) and not isinstance(e, IsADirectoryError | NotADirectoryError):
                        raise
                    self._recover(e, mono, wall)
            else:
                counters = {"corrupt_set_aside": 1} if self._set_orphans_aside() else {}
                self._create_fresh(self.path, new_epoch(), (), lambda: (counters, []), mono, wall)
                self._open_existing()
            self.degraded = False
        except (sqlite3.Error, OSError) as e:
            self._drop_conn()
            self.degraded = True
            raise _Degraded(f"{type(e).__name__}: {e}") from e

    def _set_orphans_aside(self) -> bool:
        """
        Move journal files whose spool file is gone out of the way; True if one held data.

        SQLite does not check that a ``-wal`` belongs to the file beside it: left in place, a stale
        one is replayed onto the fresh spool and resurrects the old epoch and seq, or mixes old pages
        with new ones. Without its database a WAL cannot be read back (a database file is needed for
        its page size, schema and every page the WAL does not hold), so its batches are lost. A
        non-empty ``-wal`` or ``-journal`` is kept as ``<name>.orphan-wal`` / ``.orphan-journal``
        (one set, the newest) for a technician and counted in ``corrupt_set_aside``; the collector
        sees what it never received as seq holes of the old epoch. A ``-shm`` is only an index and
        is removed.
        """
        found = [Path(str(self.path) + sfx) for sfx in ("-wal", "-journal", "-shm")]
        found = [p for p in found if p.exists() or p.is_symlink()]
        if not found:
            return False
        data = [p for p in found if not p.name.endswith("-shm") and p.is_file() and p.stat().st_size > 0]
        if data:
            for sfx in ("-wal", "-journal"):
                _remove(self.path.with_name(self.path.name + ".orphan" + sfx))
        sizes = {}
        for p in found:
            sizes[p.name] = p.stat().st_size if p.is_file() else None
            if p in data:
                os.replace(p, self.path.with_name(self.path.name + ".orphan" + p.name[len(self.path.name):]))
            else:
                _remove(p)
        _fsync_dir(self.path.parent)
        if data:
            log.error("spool_orphans_set_aside", path=str(self.path), files=sizes,
                      hint="the spool file was deleted but not its journal; batches only there are lost")
        else:
            log.info("spool_orphans_removed", path=str(self.path), files=sizes)
        return bool(data)

    def _connect(self, path: Path) -> sqlite3.Connection:
        if not path.is_file():
            # A directory or device where the spool should be is damage, not a config choice.
            raise _CorruptSpool(f"{path} is not a regular file")
        # A short busy timeout: only this process writes, but a reader (a technician's sqlite3 shell)
        # may hold a lock for a moment. It waits on the worker thread, never on the event loop.
        return sqlite3.connect(path, isolation_level=None, timeout=BUSY_TIMEOUT_S)

    def _open_existing(self) -> None:
        conn = self._connect(self.path)
        try:
            with open(self.path, "rb") as f:
                head = f.read(len(_SQLITE_HEADER))
            if head != _SQLITE_HEADER:
                raise _CorruptSpool(f"{self.path}: not an SQLite file (header {head[:16]!r})")
            conn.execute("PRAGMA journal_mode=WAL")
            conn.execute("PRAGMA synchronous=NORMAL")
            conn.execute("PRAGMA journal_size_limit=4194304")
            self._quick_check(conn)
            meta = self._read_meta(conn)
            epoch = meta.get("epoch", "")
            if meta.get("format") != str(SCHEMA_VERSION) or not _is_epoch(epoch):
                raise _CorruptSpool(f"{self.path}: not a spool of format {SCHEMA_VERSION} (meta {meta!r})")
            try:
                next_seq = int(meta["next_seq"])
                counters = {k: int(meta.get(k, "0")) for k in _COUNTERS}
            except (KeyError, ValueError) as e:
                raise _CorruptSpool(f"{self.path}: bad meta value: {e}") from e
            n, total = conn.execute("SELECT COUNT(*), COALESCE(SUM(nbytes), 0) FROM batches").fetchone()
        except BaseException:
            conn.close()
            raise
        self.conn = conn
        self.epoch, self.next_seq, self.counters = epoch, next_seq, counters
        self.batches, self.bytes = int(n), int(total)
        self._refresh_oldest(set())
        log.info("spool_opened", path=str(self.path), epoch=epoch, next_seq=next_seq, batches=self.batches,
                 bytes=self.bytes)

    @staticmethod
    def _read_meta(conn: sqlite3.Connection) -> dict[str, str]:
        tables = {r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type='table'")}
        if not {"meta", "batches", "dead_letters"} <= tables:
            raise _CorruptSpool(f"missing tables: have {sorted(tables)}")
        return {k: v for k, v in conn.execute("SELECT key, value FROM meta")}

    def _quick_check(self, conn: sqlite3.Connection) -> None:
        calls = 0

        def progress() -> int:
            nonlocal calls
            calls += 1
            return 1 if calls > QUICK_CHECK_BUDGET else 0

        conn.set_progress_handler(progress, 1000)
        try:
            rows = conn.execute("PRAGMA quick_check(5)").fetchall()
        except sqlite3.OperationalError:
            if calls > QUICK_CHECK_BUDGET:
                log.warning("spool_check_cut_short", path=str(self.path), budget=QUICK_CHECK_BUDGET)
                return
            raise
        finally:
            conn.set_progress_handler(None, 0)
        if rows != [("ok",)]:
            raise _CorruptSpool(f"quick_check: {'; '.join(str(r[0]) for r in rows)}")

    def _recover(self, cause: BaseException, mono: float, wall: float) -> None:
        """Set the damaged file aside, carry over what can be read, report the rest."""
        self._drop_conn()
        salvage = _Salvage(self.path)
        epoch = new_epoch()
        fresh = self.path.with_name(self.path.name + ".new")
        reported: list[_Interval] = []

        def finish() -> tuple[dict[str, int], list[_Interval]]:
            counters = dict(salvage.counters)
            counters["corrupt_set_aside"] = counters.get("corrupt_set_aside", 0) + 1
            lost = salvage.lost()
            counters["dropped_batches"] = (counters.get("dropped_batches", 0)
                                           + sum(i.last - i.first + 1 for i in lost if not i.unknown))
            counters["dropped_readings"] = counters.get("dropped_readings", 0) + sum(i.readings for i in lost)
            reported.extend(lost)
            return counters, lost

        try:
            self._create_fresh(fresh, epoch, salvage.rows(), finish, mono, wall)
        finally:
            salvage.close()
        aside = self.path.with_name(self.path.name + ".corrupt")
        for suffix in ("", "-wal", "-shm", "-journal"):
            _remove(Path(str(aside) + suffix))
        for suffix in ("-wal", "-shm", "-journal"):
            src = Path(str(self.path) + suffix)
            if src.exists():
                os.replace(src, Path(str(aside) + suffix))
        os.replace(self.path, aside)
        os.replace(fresh, self.path)
        _fsync_dir(self.path.parent)
        log.error("spool_corrupt_set_aside", path=str(self.path), set_aside=str(aside), cause=str(cause),
                  old_epoch=salvage.epoch or None, salvaged_batches=salvage.salvaged,
                  lost_ranges=[(i.epoch, i.first, i.last) for i in reported], new_epoch=epoch)
        self._open_existing()

    def _create_fresh(self, path: Path, epoch: str, rows: Iterable[tuple[Any, ...]],
                      finish: Callable[[], tuple[dict[str, int], list[_Interval]]], mono: float,
                      wall: float) -> None:
        """
        Build a complete spool at ``path`` via a side file, so a crash never leaves half a spool.

        ``rows`` are carried-over batches (streamed, one at a time); ``finish`` then gives the counters
        and the lost intervals to report with gap records.
        """
        tmp = path.with_name(path.name + ".tmp")
        for suffix in ("", "-wal", "-shm", "-journal"):
            _remove(Path(str(tmp) + suffix))
        conn = sqlite3.connect(tmp, isolation_level=None, timeout=BUSY_TIMEOUT_S)
        try:
            conn.execute("PRAGMA journal_mode=WAL")
            conn.execute("PRAGMA synchronous=FULL")
            conn.execute("BEGIN IMMEDIATE")
            for stmt in _SCHEMA.split(";"):
                if stmt.strip():
                    conn.execute(stmt)
            for row in rows:
                conn.execute(
                    "INSERT INTO batches (epoch, seq, digest, body, nbytes, n_readings, gap, boot, sealed_at_mono,"
                    " sealed_at_wall) VALUES (?,?,?,?,?,?,?,?,?,?)", row)
            counters, gaps = finish()
            seq = 0
            for iv in gaps:
                self._insert_gap(conn, epoch, seq, iv, GapReason.SPOOL_CORRUPT, mono, wall, offset_db=0.0)
                seq += 1
            meta = {"format": str(SCHEMA_VERSION), "epoch": epoch, "next_seq": str(seq), "created_wall": repr(wall)}
            meta.update({k: str(counters.get(k, 0)) for k in _COUNTERS})
            conn.executemany("INSERT INTO meta (key, value) VALUES (?, ?)", meta.items())
            conn.execute("COMMIT")
        finally:
            conn.close()  # the last close checkpoints and removes the -wal file
        os.replace(tmp, path)
        _fsync_dir(path.parent)

    def _drop_conn(self) -> None:
        if self.conn is not None:
            try:
                self.conn.close()
            except sqlite3.Error:
                pass
            self.conn = None

    def _ensure(self, mono: float, wall: float) -> sqlite3.Connection:
        if self.conn is None:
            self.open(mono, wall)
        assert self.conn is not None
        return self.conn

    def _guarded(self, op: Callable[[sqlite3.Connection], T], mono: float, wall: float) -> T:
        """Run ``op`` on a sound connection: recover corruption once, turn storage failures into `_Degraded`."""
        for attempt in (0, 1):
            conn = self._ensure(mono, wall)
            try:
                return op(conn)
            except (sqlite3.Error, OSError, _CorruptSpool) as e:
                if conn.in_transaction:
                    try:
                        conn.execute("ROLLBACK")
                    except sqlite3.Error:
                        pass
                if _is_corruption(e) and attempt == 0:
                    try:
                        self._recover(e, mono, wall)
                    except (sqlite3.Error, OSError) as e2:
                        self._drop_conn()
                        self.degraded = True
                        raise _Degraded(f"recovery failed: {e2}") from e2
                    continue
                # Do not retry the same commit (an fsync after a failure proves nothing): reopen later.
                self._drop_conn()
                self.degraded = True
                raise _Degraded(f"{type(e).__name__}: {e}") from e
        raise AssertionError("unreachable")

    # -------------------------------------------------------------- operations

    def seal(self, chunks: Sequence[Sequence[Reading]], boot: str, offset_db: float, acks: set[tuple[str, int]],
             extra_dropped_readings: int, mono: float, wall: float) -> list[SealedBatch]:
        """Seal each chunk as one batch, in one FULL commit; apply pending acks first."""
        contents = [encode_content(c, boot=boot, offset_db=offset_db) for c in chunks]
        bodies = [_compress(c) for c in contents]

        def op(conn: sqlite3.Connection) -> list[SealedBatch]:
            out = []
            with _transaction(conn, durable=True):
                self._delete_acked(conn, acks)
                need = sum(len(b) + ROW_OVERHEAD_BYTES for b, _ in bodies)
                self._make_room(conn, need, boot, offset_db, mono, wall)
                for content, (body, dig), chunk in zip(contents, bodies, chunks, strict=True):
                    seq = self._next_seq(conn)  # assigned inside the seal transaction, never re-cut
                    self._insert(conn, seq, dig, body, len(chunk), None, boot, mono, wall)
                    out.append(SealedBatch(self.epoch, seq, dig, content, len(chunk), mono))
                if extra_dropped_readings:
                    self._bump(conn, "dropped_readings", extra_dropped_readings)
            return out

        before = self._state()
        try:
            result = self._guarded(op, mono, wall)
        except _Degraded:
            self._restore(before)
            raise
        self._refresh_oldest(set())
        return result

    def flush_acks(self, acks: set[tuple[str, int]], mono: float, wall: float) -> None:
        def op(conn: sqlite3.Connection) -> None:
            with _transaction(conn, durable=False):
                self._delete_acked(conn, acks)

        before = self._state()
        try:
            self._guarded(op, mono, wall)
        except _Degraded:
            self._restore(before)
            raise
        self._refresh_oldest(set())

    def peek(self, skip: set[tuple[str, int]], offset_db: float, mono: float, wall: float) -> SealedBatch | None:
        """The oldest batch not in ``skip``; a row whose body fails its digest is replaced by a gap record."""

        def op(conn: sqlite3.Connection) -> SealedBatch | None:
            while True:
                found = None
                for rid, epoch, seq in conn.execute("SELECT id, epoch, seq FROM batches ORDER BY id"):
                    if (epoch, seq) not in skip:
                        found = rid
                        break
                if found is None:
                    return None
                row = conn.execute("SELECT epoch, seq, digest, body, n_readings, sealed_at_mono, nbytes"
                                   " FROM batches WHERE id=?", (found,)).fetchone()
                epoch, seq, dig, body, n, sealed_mono, nbytes = row
                try:
                    raw = gzip.decompress(body)
                    if hashlib.sha256(raw).hexdigest() != dig:
                        raise ValueError("digest mismatch")
                    content = json.loads(raw)
                except _BODY_ERRORS as e:
                    self._replace_bad_row(conn, found, epoch, seq, n, nbytes, str(e), offset_db, mono, wall)
                    continue
                return SealedBatch(epoch, seq, dig, content, n, sealed_mono)

        before = self._state()
        try:
            result = self._guarded(op, mono, wall)
        except _Degraded:
            self._restore(before)
            raise
        return result

    def dead_letter(self, epoch: str, seq: int, status: int, reason: str, offset_db: float,
                    mono: float, wall: float) -> bool:
        """Move a batch aside and seal a gap record for it; False if no such batch is spooled."""

        def op(conn: sqlite3.Connection) -> bool:
            with _transaction(conn, durable=True):
                row = conn.execute("DELETE FROM batches WHERE epoch=? AND seq=? RETURNING digest, body,"
                                   " n_readings, nbytes, gap", (epoch, seq)).fetchone()
                if row is None:
                    return False
                dig, body, n, nbytes, gap = row
                self.batches -= 1
                self.bytes -= nbytes
                conn.execute("INSERT INTO dead_letters (epoch, seq, digest, body, n_readings, status, reason,"
                             " at_wall) VALUES (?,?,?,?,?,?,?,?)", (epoch, seq, dig, body, n, status, reason, wall))
                conn.execute("DELETE FROM dead_letters WHERE id NOT IN"
                             " (SELECT id FROM dead_letters ORDER BY id DESC LIMIT ?)", (DEAD_LETTER_KEEP,))
                self._bump(conn, "dead_letters", 1)
                if gap is None:
                    # A refused gap record gets no gap record of its own (no loop); the counter says it.
                    self._seal_gap(conn, _Interval(epoch, seq, seq, n), GapReason.DEAD_LETTER, offset_db,
                                   mono, wall, status=status)
            return True

        before = self._state()
        try:
            result = self._guarded(op, mono, wall)
        except _Degraded:
            self._restore(before)
            raise
        self._refresh_oldest(set())
        return result

    def start_epoch(self, mono: float, wall: float) -> str:
        epoch = new_epoch()

        def op(conn: sqlite3.Connection) -> str:
            with _transaction(conn, durable=True):
                conn.execute("UPDATE meta SET value=? WHERE key='epoch'", (epoch,))
                conn.execute("UPDATE meta SET value='0' WHERE key='next_seq'")
            return epoch

        before = self._state()
        try:
            self._guarded(op, mono, wall)
        except _Degraded:
            self._restore(before)
            raise
        self.epoch, self.next_seq = epoch, 0
        return epoch

    def close(self) -> None:
        self._drop_conn()

    # -------------------------------------------------------------- helpers (inside a transaction)

    def _state(self) -> tuple[Any, ...]:
        return (self.epoch, self.next_seq, self.batches, self.bytes, dict(self.counters))

    def _restore(self, state: tuple[Any, ...]) -> None:
        # A rolled-back transaction leaves the disk as it was; so must the mirrors of it.
        self.epoch, self.next_seq, self.batches, self.bytes, self.counters = state
        self.counters = dict(self.counters)

    def _next_seq(self, conn: sqlite3.Connection) -> int:
        seq = self.next_seq
        self.next_seq = seq + 1
        conn.execute("UPDATE meta SET value=? WHERE key='next_seq'", (str(self.next_seq),))
        return seq

    def _bump(self, conn: sqlite3.Connection, key: str, by: int) -> None:
        self.counters[key] += by
        conn.execute("UPDATE meta SET value=? WHERE key=?", (str(self.counters[key]), key))

    def _insert(self, conn: sqlite3.Connection, seq: int, dig: str, body: bytes, n: int, gap: str | None,
                boot: str, mono: float, wall: float) -> None:
        nbytes = len(body) + ROW_OVERHEAD_BYTES
        conn.execute("INSERT INTO batches (epoch, seq, digest, body, nbytes, n_readings, gap, boot, sealed_at_mono,"
                     " sealed_at_wall) VALUES (?,?,?,?,?,?,?,?,?,?)",
                     (self.epoch, seq, dig, body, nbytes, n, gap, boot, mono, wall))
        self.batches += 1
        self.bytes += nbytes

    @staticmethod
    def _gap_object(iv: _Interval, reason: GapReason, status: int | None = None) -> dict[str, Any]:
        gap: dict[str, Any] = {"epoch": iv.epoch, "first_seq": iv.first, "last_seq": iv.last,
                               "readings": iv.readings, "reason": reason.value}
        if iv.unknown:
            gap["readings_unknown"] = True
        if status is not None:
            gap["status"] = status
        return gap

    def _insert_gap(self, conn: sqlite3.Connection, epoch: str, seq: int, iv: _Interval, reason: GapReason,
                    mono: float, wall: float, offset_db: float) -> None:
        """Insert a gap record into a spool being built (``_create_fresh``)."""
        gap = self._gap_object(iv, reason)
        content = encode_content([], boot=self.boot, offset_db=offset_db, gap=gap)
        body, dig = _compress(content)
        conn.execute("INSERT INTO batches (epoch, seq, digest, body, nbytes, n_readings, gap, boot, sealed_at_mono,"
                     " sealed_at_wall) VALUES (?,?,?,?,?,0,?,?,?,?)",
                     (epoch, seq, dig, body, len(body) + ROW_OVERHEAD_BYTES, json.dumps(gap), self.boot, mono, wall))

    def _seal_gap(self, conn: sqlite3.Connection, iv: _Interval, reason: GapReason, offset_db: float,
                  mono: float, wall: float, status: int | None = None) -> None:
        gap = self._gap_object(iv, reason, status)
        content = encode_content([], boot=self.boot, offset_db=offset_db, gap=gap)
        body, dig = _compress(content)
        self._insert(conn, self._next_seq(conn), dig, body, 0, json.dumps(gap), self.boot, mono, wall)

    def _delete_acked(self, conn: sqlite3.Connection, acks: set[tuple[str, int]]) -> None:
        for epoch, seq in acks:
            row = conn.execute("DELETE FROM batches WHERE epoch=? AND seq=? RETURNING nbytes",
                               (epoch, seq)).fetchone()
            if row is not None:
                self.batches -= 1
                self.bytes -= row[0]

    def _make_room(self, conn: sqlite3.Connection, need: int, boot: str, offset_db: float,
                   mono: float, wall: float) -> None:
        if self.bytes + need <= self.max_bytes:
            return
        target = self.max_bytes - need - int(self.max_bytes * DROP_SLACK)
        covered: dict[GapReason, list[_Interval]] = {r: [] for r in GapReason}
        dropped_batches = dropped_readings = 0
        while self.bytes > target:
            row = conn.execute("DELETE FROM batches WHERE id = (SELECT MIN(id) FROM batches)"
                               " RETURNING epoch, seq, n_readings, nbytes, gap").fetchone()
            if row is None:
                break
            epoch, seq, n, nbytes, gap = row
            self.batches -= 1
            self.bytes -= nbytes
            covered[GapReason.SPOOL_FULL].append(_Interval(epoch, seq, seq, n))
            if gap is not None:
                # Fold the dropped gap record into the new one: its range stays reported, under its reason.
                g = json.loads(gap)
                covered[GapReason(g["reason"])].append(
                    _Interval(g["epoch"], g["first_seq"], g["last_seq"], g["readings"], bool(g.get("readings_unknown"))))
            else:
                dropped_batches += 1
                dropped_readings += n
        for reason, ivs in covered.items():
            for iv in _envelopes(ivs):
                self._seal_gap(conn, iv, reason, offset_db, mono, wall)
        self._bump(conn, "dropped_batches", dropped_batches)
        self._bump(conn, "dropped_readings", dropped_readings)
        log.warning("spool_full_dropped", batches=dropped_batches, readings=dropped_readings,
                    ranges=[(i.epoch, i.first, i.last) for i in _envelopes(covered[GapReason.SPOOL_FULL])],
                    max_bytes=self.max_bytes)

    def _replace_bad_row(self, conn: sqlite3.Connection, rid: int, epoch: str, seq: int, n: int, nbytes: int,
                         problem: str, offset_db: float, mono: float, wall: float) -> None:
        with _transaction(conn, durable=True):
            conn.execute("DELETE FROM batches WHERE id=?", (rid,))
            self.batches -= 1
            self.bytes -= nbytes
            self._bump(conn, "dropped_batches", 1)
            self._bump(conn, "dropped_readings", n)
            self._seal_gap(conn, _Interval(epoch, seq, seq, n), GapReason.SPOOL_CORRUPT, offset_db, mono, wall)
        log.error("spool_batch_corrupt", epoch=epoch, seq=seq, readings=n, problem=problem)

    def _refresh_oldest(self, skip: set[tuple[str, int]]) -> None:
        self.oldest = None
        if self.conn is None:
            return
        try:
            for epoch, seq, boot, mono, wall in self.conn.execute(
                    "SELECT epoch, seq, boot, sealed_at_mono, sealed_at_wall FROM batches ORDER BY id"):
                if (epoch, seq) not in skip:
                    self.oldest = _Oldest(boot, mono, wall)
                    return
        except sqlite3.Error:
            pass  # a statistic; the next real operation will meet and handle the failure


_ROW_COLUMNS = ("epoch, seq, digest, body, nbytes, n_readings, gap, boot, sealed_at_mono, sealed_at_wall")


class _Salvage:
    """
    What a damaged spool still gives: its meta, and every batch whose body matches its digest.

    Keys are listed from the covering (epoch, seq) index and, as a fallback, by walking the table
    from both ends, so one damaged page does not hide the batches behind it. Rows are then streamed
    in their original order, one at a time.
    """

    def __init__(self, path: Path) -> None:
        self.epoch = ""
        self.next_seq = 0
        self.counters: dict[str, int] = {}
        self.salvaged = 0
        self._lost: list[_Interval] = []
        self._keys: dict[tuple[str, int], int | None] = {}
        """(epoch, seq) -> readings (None when unknown)."""
        self._conn: sqlite3.Connection | None = None
        if not path.is_file():
            return
        try:
            # Read-write open on purpose: a read-only one cannot replay a WAL whose -shm is missing.
            self._conn = sqlite3.connect(path, isolation_level=None, timeout=BUSY_TIMEOUT_S)
        except sqlite3.Error:
            return
        self._read_meta()
        self._list_keys()

    def _read_meta(self) -> None:
        assert self._conn is not None
        try:
            meta = {k: v for k, v in self._conn.execute("SELECT key, value FROM meta")}
            if _is_epoch(meta.get("epoch", "")):
                self.epoch = meta["epoch"]
                self.next_seq = int(meta.get("next_seq", "0"))
            self.counters = {k: int(meta.get(k, "0")) for k in _COUNTERS}
        except (sqlite3.Error, ValueError):
            pass

    def _list_keys(self) -> None:
        assert self._conn is not None
        queries = ("SELECT epoch, seq, NULL FROM batches ORDER BY epoch, seq",  # the covering index only
                   "SELECT epoch, seq, n_readings FROM batches ORDER BY id",
                   "SELECT epoch, seq, n_readings FROM batches ORDER BY id DESC")
        for q in queries:
            try:
                for ep, seq, n in self._conn.execute(q):
                    key = (str(ep), int(seq))
                    if self._keys.get(key) is None:
                        self._keys[key] = None if n is None else int(n)
                    if len(self._keys) >= SALVAGE_MAX_ROWS:
                        return
            except (sqlite3.Error, ValueError, TypeError):
                continue  # keep what was listed before the damage

    def rows(self) -> Iterable[tuple[Any, ...]]:
        """Good rows in their original order; a key whose row cannot be read becomes lost."""
        if self._conn is None:
            return
        order: list[tuple[int, str, int]] = []
        for (ep, seq), n in self._keys.items():
            try:
                row = self._conn.execute("SELECT id, n_readings FROM batches WHERE epoch=? AND seq=?",
                                         (ep, seq)).fetchone()
                if row is None:
                    raise ValueError("row missing")
                order.append((int(row[0]), ep, seq))
                self._keys[(ep, seq)] = int(row[1])
            except (sqlite3.Error, ValueError, TypeError):
                self._lost.append(_Interval(ep, seq, seq, n or 0, unknown=n is None))
        for rid, ep, seq in sorted(order):
            try:
                row = self._conn.execute(f"SELECT {_ROW_COLUMNS} FROM batches WHERE id=?", (rid,)).fetchone()
                if row is None or hashlib.sha256(gzip.decompress(row[3])).hexdigest() != row[2]:
                    raise ValueError("digest mismatch")
            except (sqlite3.Error, *_BODY_ERRORS):
                n = self._keys.get((ep, seq))
                self._lost.append(_Interval(ep, seq, seq, n or 0, unknown=n is None))
                continue
            self.salvaged += 1
            yield tuple(row)

    def lost(self) -> list[_Interval]:
        """Lost seq ranges, known once `rows` has been consumed."""
        lost = list(self._lost)
        if self.epoch and not self._keys and self.next_seq > 0:
            # Only the meta could be read: whatever below next_seq the collector lacks is lost.
            lost.append(_Interval(self.epoch, 0, self.next_seq - 1, 0, unknown=True))
        return _merge(lost)

    def close(self) -> None:
        if self._conn is not None:
            self._conn.close()
            self._conn = None


def _remove(p: Path) -> None:
    if p.is_dir() and not p.is_symlink():
        shutil.rmtree(p, ignore_errors=True)
    else:
        try:
            p.unlink()
        except FileNotFoundError:
            pass


def _is_epoch(s: str) -> bool:
    return len(s) == 16 and all(c in "0123456789abcdef" for c in s)


def new_epoch() -> str:
    """A fresh spool epoch: 64 random bits as 16 lower-case hex."""
    return secrets.token_hex(8)


# ------------------------------------------------------------------ the event-loop side


class Spool:
    """
    The durable queue between the pipeline and the uplink.

    Example::

        spool = await Spool.open(state / "spool.sqlite", clock=clock, max_bytes=64 << 20, flush_seconds=5)
        sealer = asyncio.create_task(spool.run_sealer(lambda: clock.boot_id, lambda: offset_db))
        spool.add(reading)                       # from the pipeline; memory only
        batch = await spool.peek_oldest()        # from the uplink
        await spool.ack(batch.epoch, batch.seq)
    """

    def __init__(self, path: Path, *, clock: Clock, max_bytes: int, flush_seconds: float,
                 max_batch_readings: int, max_pending_readings: int) -> None:
        self.path = path
        self._clock = clock
        self.max_bytes = max_bytes
        self.flush_seconds = flush_seconds
        self.max_batch_readings = max_batch_readings
        self.max_pending_readings = max_pending_readings
        self._disk = _Disk(path, max_bytes, clock.boot_id)
        self._executor = concurrent.futures.ThreadPoolExecutor(max_workers=1, thread_name_prefix="spool")
        self._pending: deque[Reading] = deque()
        self._first_add_mono: float | None = None
        self._acks: set[tuple[str, int]] = set()
        self._ram_dropped = 0
        """Readings dropped from the full RAM buffer, not yet written to the spool's counter."""
        self._ram_dropped_total = 0
        self._front_dropped = 0
        self._snap = self._disk.snapshot()
        self._seal_lock = asyncio.Lock()
        self._inflight: set[asyncio.Task[Any]] = set()
        self._retry_at = 0.0
        self._retry_interval = flush_seconds
        self._last_offset_db = 0.0
        self._last_boot = clock.boot_id
        self._closed = False

    @classmethod
    async def open(cls, path: Path, *, clock: Clock, max_bytes: int, flush_seconds: float,
                   max_batch_readings: int = 5000, max_pending_readings: int = 50_000) -> Spool:
        """
        Open the spool at ``path`` (creating it and its directory if missing).

        A corrupt file is set aside and replaced, never raised. If the storage cannot be used at all
        (disk full, I/O error, read-only card) the spool opens *degraded*: readings wait in RAM (at most
        ``max_pending_readings``) and opening is retried on a timer.

        Args:
            path: the SQLite file.
            clock: the injected clock (seal times, ages, retry timer).
            max_bytes: bound of `SpoolStats.bytes`; the oldest batches are dropped past it.
            flush_seconds: readings wait in memory at most this long, seconds.
            max_batch_readings: readings per sealed batch; more pending readings make several batches.
            max_pending_readings: hard cap of the RAM buffer (oldest readings dropped and counted past it).

        Raises:
            ValueError: a bound is not positive (the message names it).
        """
        for name, value in (("max_bytes", max_bytes), ("flush_seconds", flush_seconds),
                            ("max_batch_readings", max_batch_readings),
                            ("max_pending_readings", max_pending_readings)):
            if not isinstance(value, int | float) or isinstance(value, bool) or not value > 0:
                raise ValueError(f"{name}: must be > 0, got {value!r}")
        spool = cls(Path(path), clock=clock, max_bytes=int(max_bytes), flush_seconds=float(flush_seconds),
                    max_batch_readings=int(max_batch_readings), max_pending_readings=int(max_pending_readings))
        await spool._call(spool._disk.open, clock.monotonic(), clock.time())
        return spool

    # ---------------------------------------------------------------- intake

    def add(self, reading: Reading) -> None:
        """Queue one reading in memory (O(1), no I/O). Past the RAM cap the oldest reading is dropped."""
        if self._first_add_mono is None:
            self._first_add_mono = self._clock.monotonic()
        self._pending.append(reading)
        if len(self._pending) > self.max_pending_readings:
            self._pending.popleft()
            self._front_dropped += 1
            self._ram_dropped += 1
            self._ram_dropped_total += 1
            if self._ram_dropped_total == 1 or self._ram_dropped_total % 10_000 == 0:
                log.error("spool_ram_buffer_full", dropped_readings=self._ram_dropped_total,
                          cap=self.max_pending_readings)

    def due(self) -> bool:
        """True when pending readings have waited ``flush_seconds`` or more."""
        return (self._first_add_mono is not None
                and self._clock.monotonic() - self._first_add_mono >= self.flush_seconds)

    async def seal(self, *, boot: str, offset_db: float) -> SealedBatch | None:
        """
        Seal every pending reading (in batches of at most ``max_batch_readings``) in one durable commit.

        Pending acks are applied in the same commit. Returns the last batch sealed, or ``None`` when
        nothing was pending or the storage is failing (then the readings stay in RAM for the retry).
        """
        self._check_open()
        return await self._shielded(self._serial(self._seal, boot, offset_db))

    async def _seal(self, boot: str, offset_db: float) -> SealedBatch | None:
        self._last_offset_db = offset_db
        self._last_boot = boot
        now = self._clock.monotonic()
        if self._snap.degraded and now < self._retry_at:
            return None
        if not self._pending and not self._acks and not self._ram_dropped and not self._snap.degraded:
            return None
        readings = list(self._pending)
        front_dropped = self._front_dropped
        chunks = [readings[i:i + self.max_batch_readings] for i in range(0, len(readings), self.max_batch_readings)]
        acks = set(self._acks)
        ram_dropped = self._ram_dropped
        try:
            if chunks or ram_dropped:
                sealed = await self._call(self._disk.seal, chunks, boot, offset_db, acks, ram_dropped,
                                          now, self._clock.time())
            else:
                sealed = []
                await self._call(self._disk.flush_acks, acks, now, self._clock.time())
        except _Degraded:
            return None
        # Readings added while the commit ran stay pending; only the sealed prefix leaves. Readings the
        # RAM cap pushed out meanwhile were in the sealed snapshot, so they are not lost after all.
        pushed_out = self._front_dropped - front_dropped
        for _ in range(len(readings) - pushed_out):
            self._pending.popleft()
        self._ram_dropped -= pushed_out
        self._ram_dropped_total -= pushed_out
        self._first_add_mono = now if self._pending else None
        self._acks -= acks
        self._ram_dropped -= ram_dropped
        for b in sealed:
            log.debug("spool_batch_sealed", epoch=b.epoch, seq=b.seq, readings=b.n_readings)
        return sealed[-1] if sealed else None

    async def run_sealer(self, boot_fn: Callable[[], str], offset_fn: Callable[[], float]) -> None:
        """Seal every ``flush_seconds`` until cancelled. A seal already committing finishes first."""
        while True:
            await self._clock.sleep(self.flush_seconds)
            try:
                await self.seal(boot=boot_fn(), offset_db=offset_fn())
            except SpoolError:
                return
            except Exception:  # the scanner must keep running; the log carries the bug
                log.exception("spool_seal_failed")

    # ---------------------------------------------------------------- uplink side

    async def peek_oldest(self) -> SealedBatch | None:
        """The oldest sealed batch not yet acked or dead-lettered, read from disk (one at a time)."""
        self._check_open()
        if self._snap.degraded:
            return None
        try:
            return await self._shielded(self._call(self._disk.peek, set(self._acks), self._last_offset_db,
                                                   self._clock.monotonic(), self._clock.time()))
        except _Degraded:
            return None

    async def ack(self, epoch: str, seq: int) -> None:
        """
        The collector holds this batch: it is never returned by `peek_oldest` again.

        The delete is committed with the next seal (or within ``flush_seconds``); after a crash before
        that, the batch is sent once more and the collector answers ``duplicate``.
        """
        self._check_open()
        self._acks.add((epoch, seq))
        if len(self._acks) >= 1000:  # a fast drain with no new readings: do not let the set grow
            await self._shielded(self._serial(self._flush_acks))

    async def _flush_acks(self) -> None:
        acks = set(self._acks)
        try:
            await self._call(self._disk.flush_acks, acks, self._clock.monotonic(), self._clock.time())
        except _Degraded:
            return
        self._acks -= acks

    async def dead_letter(self, epoch: str, seq: int, status: int, reason: str) -> None:
        """
        Move a refused batch to the dead-letter table (newest `DEAD_LETTER_KEEP` kept, all counted) and
        seal a gap record (reason ``dead_letter``) so the collector can explain the missing seq.
        """
        self._check_open()
        try:
            found = await self._shielded(self._serial(self._call, self._disk.dead_letter, epoch, seq, status,
                                                      reason, self._last_offset_db, self._clock.monotonic(),
                                                      self._clock.time()))
        except _Degraded:
            return  # still spooled: it will be sent, refused and moved aside again later
        if found:
            log.warning("spool_dead_letter", epoch=epoch, seq=seq, status=status, reason=reason)
        else:
            log.info("spool_dead_letter_missing", epoch=epoch, seq=seq, status=status)

    async def new_epoch(self, reason: str) -> str:
        """
        Start a fresh epoch (seq restarts at 0). Batches already sealed keep their old key.

        Raises:
            SpoolError: the storage is failing, so the new epoch could not be made durable.
        """
        self._check_open()
        try:
            epoch = await self._shielded(self._serial(self._call, self._disk.start_epoch, self._clock.monotonic(),
                                                      self._clock.time()))
        except _Degraded as e:
            raise SpoolError(f"{self.path}: cannot start a new epoch: {e}") from e
        log.warning("spool_epoch_created", epoch=epoch, reason=reason)
        return epoch

    def stats(self) -> SpoolStats:
        """A snapshot of the spool's figures (no I/O)."""
        s = self._snap
        age = None
        if s.oldest is not None:
            if s.oldest.boot == self._clock.boot_id:
                age = max(0.0, self._clock.monotonic() - s.oldest.mono)
            else:  # sealed in an earlier boot: board monotonic time restarted, the wall clock did not
                age = max(0.0, self._clock.time() - s.oldest.wall)
        return SpoolStats(
            batches=s.batches, bytes=s.bytes, readings_pending=len(self._pending), oldest_age_s=age,
            next_seq=s.next_seq, epoch=s.epoch, dropped_batches=s.counters["dropped_batches"],
            dropped_readings=s.counters["dropped_readings"] + self._ram_dropped,
            dead_letters=s.counters["dead_letters"], corrupt_set_aside=s.counters["corrupt_set_aside"],
            degraded=s.degraded)

    async def idle(self) -> None:
        """
        Return once no spool operation is running on the worker thread.

        A commit takes real time while a virtual clock stands still only if its driver waits here
        before moving it; the sealer's next period starts when the seal returns.
        """
        while self._inflight:
            await asyncio.wait(set(self._inflight))

    async def close(self) -> None:
        """Seal what is pending (a clean shutdown loses nothing), then close the file and the worker."""
        if self._closed:
            return
        if self._inflight:
            await asyncio.gather(*self._inflight, return_exceptions=True)
        async with self._seal_lock:
            self._retry_at = 0.0  # one last attempt even if a retry is not due yet
            await self._seal(self._last_boot, self._last_offset_db)
            self._closed = True
            await self._run(self._disk.close)
        self._executor.shutdown(wait=True)
        if self._pending:
            log.error("spool_closed_with_pending", readings=len(self._pending))

    # ---------------------------------------------------------------- plumbing

    def _check_open(self) -> None:
        if self._closed:
            raise SpoolError(f"{self.path}: spool is closed")

    async def _run(self, fn: Callable[..., T], *args: Any) -> T:
        """Run ``fn`` on the worker thread and mirror the disk state afterwards, failure or not."""
        loop = asyncio.get_running_loop()
        try:
            return await loop.run_in_executor(self._executor, fn, *args)
        finally:
            self._after_disk()

    async def _call(self, fn: Callable[..., T], *args: Any) -> T:
        """`_run`, plus the degraded-mode bookkeeping when the storage failed."""
        try:
            return await self._run(fn, *args)
        except _Degraded as e:
            now = self._clock.monotonic()
            self._retry_at = now + self._retry_interval
            log.error("spool_degraded", path=str(self.path), error=str(e), retry_in_s=self._retry_interval,
                      readings_pending=len(self._pending))
            self._retry_interval = min(self._retry_interval * 2, RETRY_MAX_SECONDS)
            raise

    def _after_disk(self) -> None:
        was = self._snap.degraded
        self._snap = self._disk.snapshot()
        if was and not self._snap.degraded:
            self._retry_interval = self.flush_seconds
            log.info("spool_recovered", path=str(self.path), epoch=self._snap.epoch)

    async def _serial(self, fn: Callable[..., Awaitable[T]], *args: Any) -> T:
        """Run ``fn`` holding the seal lock: seals, acks flushes, dead letters and epochs never interleave."""
        async with self._seal_lock:
            return await fn(*args)

    async def _shielded(self, coro: Awaitable[T]) -> T:
        """Await ``coro`` so that cancelling the caller does not cut it short (its results get applied)."""
        task = asyncio.ensure_future(coro)
        self._inflight.add(task)
        task.add_done_callback(_forget(self._inflight))
        return await asyncio.shield(task)


def _forget(tasks: set[asyncio.Task[Any]]) -> Callable[[asyncio.Task[Any]], None]:
    def done(t: asyncio.Task[Any]) -> None:
        tasks.discard(t)
        if not t.cancelled():
            t.exception()  # retrieved here so an orphaned failure is not reported as "never retrieved"
    return done


__all__ = ["GapReason", "SealedBatch", "Spool", "SpoolStats", "new_epoch"]
