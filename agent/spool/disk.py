"""
The worker-thread side of the spool: one SQLite connection, the on-disk state it mirrors, opening
and recovery (set a damaged file aside, carry over what reads back), and every write.
"""

from __future__ import annotations

import gzip
import json
import os
import sqlite3
from collections.abc import Callable, Iterable, Sequence
from pathlib import Path
from typing import Any, TypeVar

import structlog

from listenpost.agent.spool.sqlfile import (
    SCHEMA_SQL,
    SQLITE_HEADER,
    CorruptSpool,
    Degraded,
    Salvage,
    fsync_dir,
    is_corruption,
    remove_path,
    transaction,
)
from listenpost.agent.spool.values import (
    BODY_ERRORS,
    BUSY_TIMEOUT_S,
    COUNTERS,
    DEAD_LETTER_KEEP,
    DROP_SLACK,
    GZIP_LEVEL,
    QUICK_CHECK_BUDGET,
    ROW_OVERHEAD_BYTES,
    SCHEMA_VERSION,
    GapReason,
    Interval,
    Oldest,
    SealedBatch,
    Snapshot,
    envelopes,
    is_epoch,
    new_epoch,
    seal_content,
)
from listenpost.core.records import Reading
from listenpost.core.wire import digest, encode_content

log = structlog.get_logger("listenpost.agent.spool")

T = TypeVar("T")


class Disk:
    """
    The SQLite side of the spool. Used only from the spool's single worker thread.

    Methods raise `Degraded` when the storage failed and the caller should keep its data in memory;
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
        self.oldest: Oldest | None = None
        self.counters = dict.fromkeys(COUNTERS, 0)
        self.degraded = False

    # -------------------------------------------------------------- open / recover

    def snapshot(self) -> Snapshot:
        return Snapshot(
            self.epoch,
            self.next_seq,
            self.batches,
            self.bytes,
            self.oldest,
            dict(self.counters),
            self.degraded,
        )

    def open(self, mono: float, wall: float) -> None:
        """Open (or create, or recover) the spool file. Raises `Degraded` if the storage fails."""
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            if self.path.exists() or self.path.is_symlink():
                try:
                    self._open_existing()
                except Exception as e:  # classified right here
                    if not is_corruption(e) and not isinstance(e, IsADirectoryError | NotADirectoryError):
                        raise
                    self._recover(e, mono, wall)
            else:
                counters = {"corrupt_set_aside": 1} if self._set_orphans_aside() else {}
                self._create_fresh(self.path, new_epoch(), (), lambda: (counters, []), mono, wall)
                self._open_existing()
            # Opening proves reads, not writes (a full card opens fine): only a commit clears ``degraded``.
        except (sqlite3.Error, OSError) as e:
            self._drop_conn()
            self.degraded = True
            raise Degraded(f"{type(e).__name__}: {e}") from e

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
                remove_path(self.path.with_name(self.path.name + ".orphan" + sfx))
        sizes = {}
        for p in found:
            sizes[p.name] = p.stat().st_size if p.is_file() else None
            if p in data:
                os.replace(p, self.path.with_name(self.path.name + ".orphan" + p.name[len(self.path.name) :]))
            else:
                remove_path(p)
        fsync_dir(self.path.parent)
        if data:
            log.error(
                "spool_orphans_set_aside",
                path=str(self.path),
                files=sizes,
                hint="the spool file was deleted but not its journal; batches only there are lost",
            )
        else:
            log.info("spool_orphans_removed", path=str(self.path), files=sizes)
        return bool(data)

    def _connect(self, path: Path) -> sqlite3.Connection:
        if not path.is_file():
            # A directory or device where the spool should be is damage, not a config choice.
            raise CorruptSpool(f"{path} is not a regular file")
        # A short busy timeout: only this process writes, but a reader (a technician's sqlite3 shell)
        # may hold a lock for a moment. It waits on the worker thread, never on the event loop.
        return sqlite3.connect(path, isolation_level=None, timeout=BUSY_TIMEOUT_S)

    def _open_existing(self) -> None:
        conn = self._connect(self.path)
        try:
            with open(self.path, "rb") as f:
                head = f.read(len(SQLITE_HEADER))
            if head != SQLITE_HEADER:
                raise CorruptSpool(f"{self.path}: not an SQLite file (header {head[:16]!r})")
            conn.execute("PRAGMA journal_mode=WAL")
            conn.execute("PRAGMA synchronous=NORMAL")
            conn.execute("PRAGMA journal_size_limit=4194304")
            self._quick_check(conn)
            meta = self._read_meta(conn)
            epoch = meta.get("epoch", "")
            if meta.get("format") != str(SCHEMA_VERSION) or not is_epoch(epoch):
                raise CorruptSpool(f"{self.path}: not a spool of format {SCHEMA_VERSION} (meta {meta!r})")
            try:
                next_seq = int(meta["next_seq"])
                counters = {k: int(meta.get(k, "0")) for k in COUNTERS}
            except (KeyError, ValueError) as e:
                raise CorruptSpool(f"{self.path}: bad meta value: {e}") from e
            n, total = conn.execute("SELECT COUNT(*), COALESCE(SUM(nbytes), 0) FROM batches").fetchone()
        except BaseException:
            conn.close()
            raise
        self.conn = conn
        self.epoch, self.next_seq, self.counters = epoch, next_seq, counters
        self.batches, self.bytes = int(n), int(total)
        self._refresh_oldest()
        log.info(
            "spool_opened",
            path=str(self.path),
            epoch=epoch,
            next_seq=next_seq,
            batches=self.batches,
            bytes=self.bytes,
        )

    @staticmethod
    def _read_meta(conn: sqlite3.Connection) -> dict[str, str]:
        tables = {r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type='table'")}
        if not {"meta", "batches", "dead_letters"} <= tables:
            raise CorruptSpool(f"missing tables: have {sorted(tables)}")
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
            raise CorruptSpool(f"quick_check: {'; '.join(str(r[0]) for r in rows)}")

    def _recover(self, cause: BaseException, mono: float, wall: float) -> None:
        """Set the damaged file aside, carry over what can be read, report the rest."""
        self._drop_conn()
        salvage = Salvage(self.path)
        epoch = new_epoch()
        fresh = self.path.with_name(self.path.name + ".new")
        reported: list[Interval] = []

        def finish() -> tuple[dict[str, int], list[Interval]]:
            counters = dict(salvage.counters)
            counters["corrupt_set_aside"] = counters.get("corrupt_set_aside", 0) + 1
            lost = salvage.lost()
            counters["dropped_batches"] = counters.get("dropped_batches", 0) + sum(
                i.last - i.first + 1 for i in lost if not i.unknown
            )
            counters["dropped_readings"] = counters.get("dropped_readings", 0) + sum(i.readings for i in lost)
            reported.extend(lost)
            return counters, lost

        try:
            self._create_fresh(fresh, epoch, salvage.rows(), finish, mono, wall)
        finally:
            salvage.close()
        aside = self.path.with_name(self.path.name + ".corrupt")
        for suffix in ("", "-wal", "-shm", "-journal"):
            remove_path(Path(str(aside) + suffix))
        for suffix in ("-wal", "-shm", "-journal"):
            src = Path(str(self.path) + suffix)
            if src.exists():
                os.replace(src, Path(str(aside) + suffix))
        os.replace(self.path, aside)
        os.replace(fresh, self.path)
        fsync_dir(self.path.parent)
        log.error(
            "spool_corrupt_set_aside",
            path=str(self.path),
            set_aside=str(aside),
            cause=str(cause),
            old_epoch=salvage.epoch or None,
            salvaged_batches=salvage.salvaged,
            lost_ranges=[(i.epoch, i.first, i.last) for i in reported],
            new_epoch=epoch,
        )
        self._open_existing()

    def _create_fresh(
        self,
        path: Path,
        epoch: str,
        rows: Iterable[tuple[Any, ...]],
        finish: Callable[[], tuple[dict[str, int], list[Interval]]],
        mono: float,
        wall: float,
    ) -> None:
        """
        Build a complete spool at ``path`` via a side file, so a crash never leaves half a spool.

        ``rows`` are carried-over batches (streamed, one at a time); ``finish`` then gives the counters
        and the lost intervals to report with gap records.
        """
        tmp = path.with_name(path.name + ".tmp")
        for suffix in ("", "-wal", "-shm", "-journal"):
            remove_path(Path(str(tmp) + suffix))
        conn = sqlite3.connect(tmp, isolation_level=None, timeout=BUSY_TIMEOUT_S)
        try:
            conn.execute("PRAGMA journal_mode=WAL")
            conn.execute("PRAGMA synchronous=FULL")
            conn.execute("BEGIN IMMEDIATE")
            for stmt in SCHEMA_SQL.split(";"):
                if stmt.strip():
                    conn.execute(stmt)
            for row in rows:
                conn.execute(
                    "INSERT INTO batches (epoch, seq, digest, body, nbytes, n_readings, gap, boot, sealed_at_mono,"
                    " sealed_at_wall) VALUES (?,?,?,?,?,?,?,?,?,?)",
                    row,
                )
            counters, gaps = finish()
            seq = 0
            for iv in gaps:
                self._insert_gap(conn, epoch, seq, iv, GapReason.SPOOL_CORRUPT, mono, wall, offset_db=0.0)
                seq += 1
            meta = {
                "format": str(SCHEMA_VERSION),
                "epoch": epoch,
                "next_seq": str(seq),
                "created_wall": repr(wall),
            }
            meta.update({k: str(counters.get(k, 0)) for k in COUNTERS})
            conn.executemany("INSERT INTO meta (key, value) VALUES (?, ?)", meta.items())
            conn.execute("COMMIT")
        finally:
            conn.close()  # the last close checkpoints and removes the -wal file
        os.replace(tmp, path)
        fsync_dir(path.parent)

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
        """Run ``op`` on a sound connection: recover corruption once, turn storage failures into `Degraded`."""
        for attempt in (0, 1):
            conn = self._ensure(mono, wall)
            try:
                return op(conn)
            except (sqlite3.Error, OSError, CorruptSpool) as e:
                if conn.in_transaction:
                    try:
                        conn.execute("ROLLBACK")
                    except sqlite3.Error:
                        pass
                if is_corruption(e) and attempt == 0:
                    try:
                        self._recover(e, mono, wall)
                    except (sqlite3.Error, OSError) as e2:
                        self._drop_conn()
                        self.degraded = True
                        raise Degraded(f"recovery failed: {e2}") from e2
                    continue
                # Do not retry the same commit (an fsync after a failure proves nothing): reopen later.
                self._drop_conn()
                self.degraded = True
                raise Degraded(f"{type(e).__name__}: {e}") from e
        raise AssertionError("unreachable")

    def _apply(self, op: Callable[[sqlite3.Connection], T], mono: float, wall: float, *, refresh: bool) -> T:
        """`_guarded`, with the in-memory mirrors put back when the storage failed (nothing was committed)."""
        before = self._state()
        try:
            result = self._guarded(op, mono, wall)
        except Degraded:
            self._restore(before)
            raise
        if refresh:  # a write committed: the storage works again
            self.degraded = False
            self._refresh_oldest()
        return result

    # -------------------------------------------------------------- operations

    def seal(
        self,
        chunks: Sequence[Sequence[Reading]],
        boot: str,
        offset_db: float,
        acks: set[tuple[str, int]],
        extra_dropped_readings: int,
        mono: float,
        wall: float,
        carried: Sequence[tuple[SealedBatch, dict[str, Any] | None]] = (),
        extra_dropped_batches: int = 0,
    ) -> list[SealedBatch]:
        """
        Seal each chunk as one batch, in one FULL commit; apply pending acks first.

        ``carried`` are batches sealed in memory while the storage failed (with their gap object, if
        any): they are written first, under their own keys, and keep them. ``extra_dropped_*`` are
        drops from memory to add to the durable counters.
        """
        sealed = [seal_content(encode_content(c, boot=boot, offset_db=offset_db)) for c in chunks]
        kept = [(b, gzip.compress(b.content, compresslevel=GZIP_LEVEL, mtime=0), gap) for b, gap in carried]

        def op(conn: sqlite3.Connection) -> list[SealedBatch]:
            out = []
            with transaction(conn, durable=True):
                self._delete_acked(conn, acks)
                need = sum(len(body) + ROW_OVERHEAD_BYTES for _, body, _ in sealed)
                need += sum(len(body) + ROW_OVERHEAD_BYTES for _, body, _ in kept)
                self._make_room(conn, need, boot, offset_db, mono, wall)
                for b, body, gap in kept:
                    at_wall = wall - max(0.0, mono - b.sealed_at_mono)
                    self._insert(
                        conn,
                        b.seq,
                        b.digest,
                        body,
                        b.n_readings,
                        json.dumps(gap) if gap is not None else None,
                        boot,
                        b.sealed_at_mono,
                        at_wall,
                        epoch=b.epoch,
                    )
                for (content, body, dig), chunk in zip(sealed, chunks, strict=True):
                    seq = self._next_seq(conn)  # assigned inside the seal transaction, never re-cut
                    self._insert(conn, seq, dig, body, len(chunk), None, boot, mono, wall)
                    out.append(SealedBatch(self.epoch, seq, dig, content, len(chunk), mono))
                if extra_dropped_readings:
                    self._bump(conn, "dropped_readings", extra_dropped_readings)
                if extra_dropped_batches:
                    self._bump(conn, "dropped_batches", extra_dropped_batches)
            return out

        return self._apply(op, mono, wall, refresh=True)

    def flush_acks(self, acks: set[tuple[str, int]], mono: float, wall: float) -> None:
        def op(conn: sqlite3.Connection) -> None:
            with transaction(conn, durable=False):
                self._delete_acked(conn, acks)

        self._apply(op, mono, wall, refresh=True)

    def peek(
        self, skip: set[tuple[str, int]], offset_db: float, mono: float, wall: float
    ) -> SealedBatch | None:
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
                row = conn.execute(
                    "SELECT epoch, seq, digest, body, n_readings, sealed_at_mono, nbytes"
                    " FROM batches WHERE id=?",
                    (found,),
                ).fetchone()
                epoch, seq, dig, body, n, sealed_mono, nbytes = row
                try:
                    content = gzip.decompress(body)
                    if digest(content) != dig:
                        raise ValueError("digest mismatch")
                except BODY_ERRORS as e:
                    self._replace_bad_row(conn, found, epoch, seq, n, nbytes, str(e), offset_db, mono, wall)
                    continue
                return SealedBatch(epoch, seq, dig, content, n, sealed_mono)

        return self._apply(op, mono, wall, refresh=False)

    def dead_letter(
        self, epoch: str, seq: int, status: int, reason: str, offset_db: float, mono: float, wall: float
    ) -> bool:
        """Move a batch aside and seal a gap record for it; False if no such batch is spooled."""

        def op(conn: sqlite3.Connection) -> bool:
            with transaction(conn, durable=True):
                row = conn.execute(
                    "DELETE FROM batches WHERE epoch=? AND seq=? RETURNING digest, body,"
                    " n_readings, nbytes, gap",
                    (epoch, seq),
                ).fetchone()
                if row is None:
                    return False
                dig, body, n, nbytes, gap = row
                self.batches -= 1
                self.bytes -= nbytes
                conn.execute(
                    "INSERT INTO dead_letters (epoch, seq, digest, body, n_readings, status, reason,"
                    " at_wall) VALUES (?,?,?,?,?,?,?,?)",
                    (epoch, seq, dig, body, n, status, reason, wall),
                )
                conn.execute(
                    "DELETE FROM dead_letters WHERE id NOT IN"
                    " (SELECT id FROM dead_letters ORDER BY id DESC LIMIT ?)",
                    (DEAD_LETTER_KEEP,),
                )
                self._bump(conn, "dead_letters", 1)
                if gap is None:
                    # A refused gap record gets no gap record of its own (no loop); the counter says it.
                    self._seal_gap(
                        conn,
                        Interval(epoch, seq, seq, n),
                        GapReason.DEAD_LETTER,
                        offset_db,
                        mono,
                        wall,
                        status=status,
                    )
            return True

        return self._apply(op, mono, wall, refresh=True)

    def start_epoch(self, mono: float, wall: float) -> str:
        epoch = new_epoch()

        def op(conn: sqlite3.Connection) -> str:
            with transaction(conn, durable=True):
                conn.execute("UPDATE meta SET value=? WHERE key='epoch'", (epoch,))
                conn.execute("UPDATE meta SET value='0' WHERE key='next_seq'")
            return epoch

        self._apply(op, mono, wall, refresh=True)
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

    def _insert(
        self,
        conn: sqlite3.Connection,
        seq: int,
        dig: str,
        body: bytes,
        n: int,
        gap: str | None,
        boot: str,
        mono: float,
        wall: float,
        *,
        epoch: str | None = None,
    ) -> None:
        nbytes = len(body) + ROW_OVERHEAD_BYTES
        conn.execute(
            "INSERT INTO batches (epoch, seq, digest, body, nbytes, n_readings, gap, boot, sealed_at_mono,"
            " sealed_at_wall) VALUES (?,?,?,?,?,?,?,?,?,?)",
            (epoch or self.epoch, seq, dig, body, nbytes, n, gap, boot, mono, wall),
        )
        self.batches += 1
        self.bytes += nbytes

    @staticmethod
    def _gap_object(iv: Interval, reason: GapReason, status: int | None = None) -> dict[str, Any]:
        gap: dict[str, Any] = {
            "epoch": iv.epoch,
            "first_seq": iv.first,
            "last_seq": iv.last,
            "readings": iv.readings,
            "reason": reason.value,
        }
        if iv.unknown:
            gap["readings_unknown"] = True
        if status is not None:
            gap["status"] = status
        return gap

    def _insert_gap(
        self,
        conn: sqlite3.Connection,
        epoch: str,
        seq: int,
        iv: Interval,
        reason: GapReason,
        mono: float,
        wall: float,
        offset_db: float,
    ) -> None:
        """Insert a gap record into a spool being built (``_create_fresh``)."""
        gap = self._gap_object(iv, reason)
        _, body, dig = seal_content(encode_content([], boot=self.boot, offset_db=offset_db, gap=gap))
        conn.execute(
            "INSERT INTO batches (epoch, seq, digest, body, nbytes, n_readings, gap, boot, sealed_at_mono,"
            " sealed_at_wall) VALUES (?,?,?,?,?,0,?,?,?,?)",
            (epoch, seq, dig, body, len(body) + ROW_OVERHEAD_BYTES, json.dumps(gap), self.boot, mono, wall),
        )

    def _seal_gap(
        self,
        conn: sqlite3.Connection,
        iv: Interval,
        reason: GapReason,
        offset_db: float,
        mono: float,
        wall: float,
        status: int | None = None,
    ) -> None:
        gap = self._gap_object(iv, reason, status)
        _, body, dig = seal_content(encode_content([], boot=self.boot, offset_db=offset_db, gap=gap))
        self._insert(conn, self._next_seq(conn), dig, body, 0, json.dumps(gap), self.boot, mono, wall)

    def _delete_acked(self, conn: sqlite3.Connection, acks: set[tuple[str, int]]) -> None:
        for epoch, seq in acks:
            row = conn.execute(
                "DELETE FROM batches WHERE epoch=? AND seq=? RETURNING nbytes", (epoch, seq)
            ).fetchone()
            if row is not None:
                self.batches -= 1
                self.bytes -= row[0]

    def _make_room(
        self, conn: sqlite3.Connection, need: int, boot: str, offset_db: float, mono: float, wall: float
    ) -> None:
        if self.bytes + need <= self.max_bytes:
            return
        target = self.max_bytes - need - int(self.max_bytes * DROP_SLACK)
        covered: dict[GapReason, list[Interval]] = {r: [] for r in GapReason}
        dropped_batches = dropped_readings = 0
        while self.bytes > target:
            row = conn.execute(
                "DELETE FROM batches WHERE id = (SELECT MIN(id) FROM batches)"
                " RETURNING epoch, seq, n_readings, nbytes, gap"
            ).fetchone()
            if row is None:
                break
            epoch, seq, n, nbytes, gap = row
            self.batches -= 1
            self.bytes -= nbytes
            covered[GapReason.SPOOL_FULL].append(Interval(epoch, seq, seq, n))
            if gap is not None:
                # Fold the dropped gap record into the new one: its range stays reported, under its reason.
                g = json.loads(gap)
                covered[GapReason(g["reason"])].append(
                    Interval(
                        g["epoch"],
                        g["first_seq"],
                        g["last_seq"],
                        g["readings"],
                        bool(g.get("readings_unknown")),
                    )
                )
            else:
                dropped_batches += 1
                dropped_readings += n
        for reason, ivs in covered.items():
            for iv in envelopes(ivs):
                self._seal_gap(conn, iv, reason, offset_db, mono, wall)
        self._bump(conn, "dropped_batches", dropped_batches)
        self._bump(conn, "dropped_readings", dropped_readings)
        log.warning(
            "spool_full_dropped",
            batches=dropped_batches,
            readings=dropped_readings,
            ranges=[(i.epoch, i.first, i.last) for i in envelopes(covered[GapReason.SPOOL_FULL])],
            max_bytes=self.max_bytes,
        )

    def _replace_bad_row(
        self,
        conn: sqlite3.Connection,
        rid: int,
        epoch: str,
        seq: int,
        n: int,
        nbytes: int,
        problem: str,
        offset_db: float,
        mono: float,
        wall: float,
    ) -> None:
        with transaction(conn, durable=True):
            conn.execute("DELETE FROM batches WHERE id=?", (rid,))
            self.batches -= 1
            self.bytes -= nbytes
            self._bump(conn, "dropped_batches", 1)
            self._bump(conn, "dropped_readings", n)
            self._seal_gap(conn, Interval(epoch, seq, seq, n), GapReason.SPOOL_CORRUPT, offset_db, mono, wall)
        log.error("spool_batch_corrupt", epoch=epoch, seq=seq, readings=n, problem=problem)

    def _refresh_oldest(self) -> None:
        self.oldest = None
        if self.conn is None:
            return
        try:
            row = self.conn.execute(
                "SELECT boot, sealed_at_mono, sealed_at_wall FROM batches ORDER BY id LIMIT 1"
            ).fetchone()
            if row is not None:
                self.oldest = Oldest(*row)
        except sqlite3.Error:
            pass  # a statistic; the next real operation will meet and handle the failure
