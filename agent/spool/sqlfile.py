"""
SQLite file primitives of the spool: the schema, one write transaction, telling corruption from a
passing storage failure, durable renames, and salvage of what a damaged file still holds.
"""

from __future__ import annotations

import contextlib
import gzip
import hashlib
import os
import shutil
import sqlite3
from collections.abc import Iterable, Iterator
from pathlib import Path
from typing import Any

from listenpost.agent.spool.values import (
    BODY_ERRORS,
    BUSY_TIMEOUT_S,
    COUNTERS,
    SALVAGE_MAX_ROWS,
    Interval,
    is_epoch,
    merge_intervals,
)

_CORRUPT_CODES = {11, 24, 26}  # SQLITE_CORRUPT, SQLITE_FORMAT, SQLITE_NOTADB (sqlite.org/rescode.html)
SQLITE_HEADER = b"SQLite format 3\x00"  # sqlite.org/fileformat2.html §1.3

SCHEMA_SQL = """
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


class Degraded(Exception):
    """The storage failed in a way a retry later may fix (disk full, I/O error, cannot open)."""


def _errcode(e: BaseException) -> int | None:
    code = getattr(e, "sqlite_errorcode", None)
    return code & 0xFF if isinstance(code, int) else None


def is_corruption(e: BaseException) -> bool:
    if isinstance(e, CorruptSpool):
        return True
    if isinstance(e, sqlite3.DatabaseError) and _errcode(e) in _CORRUPT_CODES:
        return True
    # Some corruption surfaces without an extended code (e.g. via the row decoder).
    return (
        isinstance(e, sqlite3.DatabaseError)
        and not isinstance(e, sqlite3.OperationalError)
        and ("malformed" in str(e) or "not a database" in str(e))
    )


class CorruptSpool(Exception):
    """The file opens but is not a sound spool (failed check, wrong schema, unreadable meta)."""


@contextlib.contextmanager
def transaction(conn: sqlite3.Connection, *, durable: bool) -> Iterator[None]:
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


def fsync_dir(path: Path) -> None:
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


def remove_path(p: Path) -> None:
    if p.is_dir() and not p.is_symlink():
        shutil.rmtree(p, ignore_errors=True)
    else:
        try:
            p.unlink()
        except FileNotFoundError:
            pass


ROW_COLUMNS = "epoch, seq, digest, body, nbytes, n_readings, gap, boot, sealed_at_mono, sealed_at_wall"


class Salvage:
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
        self._lost: list[Interval] = []
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
            if is_epoch(meta.get("epoch", "")):
                self.epoch = meta["epoch"]
                self.next_seq = int(meta.get("next_seq", "0"))
            self.counters = {k: int(meta.get(k, "0")) for k in COUNTERS}
        except (sqlite3.Error, ValueError):
            pass

    def _list_keys(self) -> None:
        assert self._conn is not None
        queries = (
            "SELECT epoch, seq, NULL FROM batches ORDER BY epoch, seq",  # the covering index only
            "SELECT epoch, seq, n_readings FROM batches ORDER BY id",
            "SELECT epoch, seq, n_readings FROM batches ORDER BY id DESC",
        )
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
                row = self._conn.execute(
                    "SELECT id, n_readings FROM batches WHERE epoch=? AND seq=?", (ep, seq)
                ).fetchone()
                if row is None:
                    raise ValueError("row missing")
                order.append((int(row[0]), ep, seq))
                self._keys[(ep, seq)] = int(row[1])
            except (sqlite3.Error, ValueError, TypeError):
                self._lost.append(Interval(ep, seq, seq, n or 0, unknown=n is None))
        for rid, ep, seq in sorted(order):
            try:
                row = self._conn.execute(f"SELECT {ROW_COLUMNS} FROM batches WHERE id=?", (rid,)).fetchone()
                if row is None or hashlib.sha256(gzip.decompress(row[3])).hexdigest() != row[2]:
                    raise ValueError("digest mismatch")
            except (sqlite3.Error, *BODY_ERRORS):
                n = self._keys.get((ep, seq))
                self._lost.append(Interval(ep, seq, seq, n or 0, unknown=n is None))
                continue
            self.salvaged += 1
            yield tuple(row)

    def lost(self) -> list[Interval]:
        """Lost seq ranges, known once `rows` has been consumed."""
        lost = list(self._lost)
        if self.epoch and not self._keys and self.next_seq > 0:
            # Only the meta could be read: whatever below next_seq the collector lacks is lost.
            lost.append(Interval(self.epoch, 0, self.next_seq - 1, 0, unknown=True))
        return merge_intervals(lost)

    def close(self) -> None:
        if self._conn is not None:
            self._conn.close()
            self._conn = None
