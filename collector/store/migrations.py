"""
Versioned schema migrations for both backends.

Each migration has a number; a database records what it has in ``schema_version`` (one row per applied
migration). Opening a store applies the missing ones in order, each in its own transaction together with
its ``schema_version`` row (both SQLite and PostgreSQL have transactional DDL, so a failing migration
leaves the database at the previous version, not half-way). A database whose version is higher than the
newest migration known here is refused with `SchemaTooNew`.

Layout choices, the same in both dialects:

- ``readings`` is the big table (order of 100 boards × 500 tags × 1 Hz). It holds small integer ids
  (``board_id``, ``tag_id``, ``batch_id``) instead of names; the boot id and the offset come from the
  batch row. ``bench/ingest_store.py`` measures what the interning saves.
- ``tags`` both interns every identity seen in a batch (``added_at`` NULL) and registers tags
  (``added_at`` set; ``retired_at`` set when retired).
- ``batches`` keeps every batch header, gap records included; its unique (board_id, epoch, seq) key is
  the dedup key and is never deleted while the board exists.
- Per-board counters live on ``boards`` and are bumped in the ingest transaction, so status pages do
  not sum the batch table.
- On PostgreSQL, ``readings`` is partitioned by range of ``t_collector``, one partition per UTC day
  named ``readings_YYYYMMDD`` (migration 7), so retention drops whole days (collector/store/postgres.py).
  SQLite keeps one table; its migration 7 changes nothing and only keeps the version numbers of the two
  dialects in step.
"""

from __future__ import annotations

import sqlite3
import time
from dataclasses import dataclass
from typing import Any

import structlog

from listenpost.collector.store import SchemaTooNew

log = structlog.get_logger("listenpost.collector.store.migrations")


@dataclass(frozen=True, slots=True)
class Migration:
    """One numbered schema step."""

    version: int
    name: str
    statements: tuple[str, ...]


# Seq holes, kept up to date by every ingest instead of recomputed from all batches each round.
# ``seq_reach``: per (board, epoch), the lowest and highest seq any batch or gap record covered;
# ``seq_holes``: the maximal runs in between that nothing covered. Existing databases get both from
# the batches they hold (`HOLES_SCAN`). ``batches.gap_epoch`` is the
# epoch a gap record's range belongs to (its own ``epoch`` field; NULL: the batch's epoch).
def _SEQ_ACCOUNTING(integer: str, text: str) -> tuple[str, ...]:  # noqa: N802 - reads as a constant
    return (
        f"ALTER TABLE batches ADD COLUMN gap_epoch {text}",
        f"""CREATE TABLE seq_reach (
            board_id {integer} NOT NULL references boards(id),
            epoch {text} NOT NULL,
            first_seq {integer} NOT NULL,
            reach {integer} NOT NULL,
            PRIMARY KEY (board_id, epoch))""",
        f"""CREATE TABLE seq_holes (
            board_id {integer} NOT NULL references boards(id),
            epoch {text} NOT NULL,
            first_seq {integer} NOT NULL,
            last_seq {integer} NOT NULL,
            PRIMARY KEY (board_id, epoch, first_seq))""",
        """INSERT INTO seq_reach (board_id, epoch, first_seq, reach)
            SELECT board_id, epoch, min(lo), max(hi) FROM (
                SELECT board_id, epoch, seq AS lo, seq AS hi FROM batches
                UNION ALL
                SELECT board_id, coalesce(gap_epoch, epoch), gap_first, gap_last FROM batches
                WHERE gap_first IS NOT NULL) iv
            GROUP BY board_id, epoch""",
        f"INSERT INTO seq_holes (board_id, epoch, first_seq, last_seq) {HOLES_SCAN.format(board='1 = 1')}",
    )


# The calibration watch's memory per board (collector/models/calibration.py): the level at calibration per
# reference tag as a JSON object, so a restarted or new leader compares against it instead of learning a
# level that may already carry the shift.
def _WATCH(integer: str, real: str, text: str) -> str:  # noqa: N802 - reads as a constant
    return f"""CREATE TABLE watch_baselines (
            board_id {integer} PRIMARY KEY references boards(id),
            marker {real} NOT NULL,
            baseline_from {real} NOT NULL,
            levels {text} NOT NULL,
            shift_since {real},
            raised boolean NOT NULL)"""


# What each board's heartbeats say of its spool, so a tail of batches that never arrived is seen once the
# board moved to a new epoch: ``seq_reach.announced`` is the highest seq a heartbeat said the spool had
# sealed in that epoch; ``boards.spool_epoch`` the epoch of its newest heartbeat (common.SEQ_HOLES_SQL).
def _SPOOL_TAILS(integer: str, real: str, text: str) -> tuple[str, ...]:  # noqa: N802 - reads as a constant
    return (
        f"ALTER TABLE seq_reach ADD COLUMN announced {integer}",
        f"ALTER TABLE boards ADD COLUMN spool_epoch {text}",
        f"ALTER TABLE boards ADD COLUMN spool_epoch_at {real}",
    )


# Migration 7 (PostgreSQL): readings becomes a table partitioned by range of t_collector, one partition per
# UTC day [d * 86400, (d + 1) * 86400), named for its day. The old table's rows move into partitions made
# for the days they cover, in their physical order (roughly collector-time order, which is what keeps the
# per-partition BRIN ranges tight), then the old table goes; all in the migration's one transaction. The
# columns and CHECK constraints are those of migration 2 (readings has no primary or foreign key, so no
# key has to grow the partition column). The BRIN index is made on the partitioned table after the move:
# one build per partition, and every later partition gets its own automatically.
# The name's day must be the one `postgres.partition_name` computes: to_char of the UTC midnight.
_READINGS_DAYS = (
    "ALTER TABLE readings RENAME TO readings_unpartitioned",
    "DROP INDEX readings_t",
    """CREATE TABLE readings (
        t_collector float8 NOT NULL
            CONSTRAINT t_collector_finite CHECK (t_collector > '-Infinity' AND t_collector < 'Infinity'),
        t_board_ms bigint NOT NULL,
        batch_id bigint NOT NULL,
        tag_id integer NOT NULL,
        board_id smallint NOT NULL,
        rssi_dd smallint NOT NULL CONSTRAINT rssi_dd_range CHECK (rssi_dd BETWEEN -2000 AND 500))
    PARTITION BY RANGE (t_collector)""",
    """DO $$
    DECLARE d bigint;
    BEGIN
        FOR d IN SELECT DISTINCT floor(t_collector / 86400)::bigint FROM readings_unpartitioned LOOP
            EXECUTE format(
                'CREATE TABLE %I PARTITION OF readings FOR VALUES FROM (%s) TO (%s)',
                'readings_' || to_char(to_timestamp(d * 86400) AT TIME ZONE 'UTC', 'YYYYMMDD'),
                d * 86400, (d + 1) * 86400);
        END LOOP;
    END $$""",
    "INSERT INTO readings (t_collector, t_board_ms, batch_id, tag_id, board_id, rssi_dd) "
    "SELECT t_collector, t_board_ms, batch_id, tag_id, board_id, rssi_dd FROM readings_unpartitioned",
    "DROP TABLE readings_unpartitioned",
    "CREATE INDEX readings_t ON readings USING brin (t_collector) WITH (pages_per_range = 32)",
)


# Seq holes remember whether the monitor has reported them (a ``loss`` event), so its round reads the holes
# still open, not every loss ever: those stay in ``seq_holes`` for good. Existing databases mark the holes
# whose event is stored (its key names the hole); the monitor marks the rest as it meets them.
def _HOLES_REPORTED(boolean: str, false: str, true: str, open_: str) -> tuple[str, ...]:  # noqa: N802
    return (
        f"ALTER TABLE seq_holes ADD COLUMN reported {boolean} NOT NULL DEFAULT {false}",
        f"""UPDATE seq_holes SET reported = {true} WHERE EXISTS (
            SELECT 1 FROM events e JOIN boards b ON b.id = e.board_id
            WHERE e.board_id = seq_holes.board_id AND e.kind = 'loss'
            AND e.key = 'loss/' || b.name || '/' || seq_holes.epoch || '/' || seq_holes.first_seq || '-'
                || seq_holes.last_seq)""",
        f"CREATE INDEX seq_holes_open ON seq_holes(board_id, epoch, first_seq) WHERE {open_}",
    )


HOLES_SCAN = """
WITH iv AS (
    SELECT board_id, epoch, seq AS lo, seq AS hi FROM batches WHERE {board}
    UNION ALL
    SELECT board_id, coalesce(gap_epoch, epoch), gap_first, gap_last FROM batches
    WHERE gap_first IS NOT NULL AND {board}
), w AS (
    SELECT board_id, epoch, lo,
           max(hi) OVER (PARTITION BY board_id, epoch ORDER BY lo, hi
                         ROWS BETWEEN UNBOUNDED PRECEDING AND 1 PRECEDING) AS reach
    FROM iv
)
SELECT w.board_id, w.epoch, w.reach + 1, w.lo - 1 FROM w WHERE w.reach IS NOT NULL AND w.lo > w.reach + 1
"""
"""Every seq hole of the batches table by a full scan (board id, epoch, first, last): what ``seq_holes``
holds. Migration 4 fills that table with it; tests compare the kept table against it."""


SQLITE: tuple[Migration, ...] = (
    Migration(
        1,
        "boards, enrollment, tags, calibration, events, heartbeats, clock samples",
        (
            """CREATE TABLE boards (
            id INTEGER PRIMARY KEY,
            name TEXT NOT NULL UNIQUE,
            room TEXT NOT NULL,
            floor TEXT,
            created_at REAL NOT NULL,
            enrolled_at REAL,
            fingerprint TEXT,
            offset_db REAL NOT NULL DEFAULT 0,
            retired_at REAL,
            token_hash TEXT UNIQUE,
            last_boot TEXT,
            last_boot_at REAL,
            readings_total INTEGER NOT NULL DEFAULT 0,
            batches_total INTEGER NOT NULL DEFAULT 0,
            gap_readings INTEGER NOT NULL DEFAULT 0,
            last_batch_at REAL)""",
            """CREATE TABLE enrollments (
            code_hash TEXT PRIMARY KEY,
            board_id INTEGER NOT NULL references boards(id),
            expires_at REAL NOT NULL,
            used_at REAL)""",
            "CREATE INDEX enrollments_board ON enrollments(board_id)",
            """CREATE TABLE calibrations (
            id INTEGER PRIMARY KEY,
            board_id INTEGER NOT NULL references boards(id),
            at REAL NOT NULL,
            offset_db REAL NOT NULL,
            spread_db REAL NOT NULL,
            samples INTEGER NOT NULL,
            reference_tag TEXT NOT NULL,
            distance_m REAL NOT NULL,
            fingerprint TEXT)""",
            "CREATE INDEX calibrations_board ON calibrations(board_id, at)",
            """CREATE TABLE tags (
            id INTEGER PRIMARY KEY,
            tag TEXT NOT NULL UNIQUE,
            added_at REAL,
            retired_at REAL)""",
            # AUTOINCREMENT: event ids are a cursor (events(since_id=...)), so they must never be reused.
            """CREATE TABLE events (
            id INTEGER PRIMARY KEY AUTOINCREMENT,
            at REAL NOT NULL,
            board_id INTEGER references boards(id),
            kind TEXT NOT NULL,
            detail TEXT NOT NULL)""",
            "CREATE INDEX events_board ON events(board_id, id)",
            """CREATE TABLE heartbeats (
            id INTEGER PRIMARY KEY,
            board_id INTEGER NOT NULL references boards(id),
            at REAL NOT NULL,
            boot TEXT NOT NULL,
            stats TEXT NOT NULL)""",
            "CREATE INDEX heartbeats_board_at ON heartbeats(board_id, at)",
            """CREATE TABLE clock_samples (
            id INTEGER PRIMARY KEY,
            board_id INTEGER NOT NULL references boards(id),
            boot TEXT NOT NULL,
            t1 REAL NOT NULL, t2 REAL NOT NULL, t3 REAL NOT NULL, t4 REAL NOT NULL)""",
            "CREATE INDEX clock_samples_board ON clock_samples(board_id, boot, t2)",
            "CREATE INDEX clock_samples_t2 ON clock_samples(t2)",
        ),
    ),
    Migration(
        2,
        "batches, readings, telemetry",
        (
            """CREATE TABLE batches (
            id INTEGER PRIMARY KEY,
            board_id INTEGER NOT NULL references boards(id),
            epoch TEXT NOT NULL,
            seq INTEGER NOT NULL CONSTRAINT seq_non_negative CHECK (seq >= 0),
            digest TEXT NOT NULL,
            boot TEXT NOT NULL,
            n INTEGER NOT NULL,
            received_at REAL NOT NULL,
            offset_dd INTEGER NOT NULL,
            gap_first INTEGER,
            gap_last INTEGER,
            gap_readings INTEGER,
            gap_reason TEXT,
            UNIQUE (board_id, epoch, seq))""",
            # No foreign keys on the big table: SQLite would check each one per row; ids come from the
            # same transaction that inserts the batch.
            """CREATE TABLE readings (
            batch_id INTEGER NOT NULL,
            board_id INTEGER NOT NULL,
            tag_id INTEGER NOT NULL,
            t_board_ms INTEGER NOT NULL,
            t_collector REAL NOT NULL,
            rssi_dd INTEGER NOT NULL CONSTRAINT rssi_dd_range CHECK (rssi_dd BETWEEN -2000 AND 500))""",
            "CREATE INDEX readings_t ON readings(t_collector)",
            """CREATE TABLE telemetry (
            id INTEGER PRIMARY KEY,
            batch_id INTEGER NOT NULL references batches(id),
            board_id INTEGER NOT NULL,
            tag_id INTEGER NOT NULL,
            at REAL NOT NULL,
            t_board_ms INTEGER NOT NULL,
            battery_mv REAL, temperature_c REAL, adv_count REAL, uptime_s REAL)""",
            "CREATE INDEX telemetry_tag ON telemetry(tag_id, at)",
            "CREATE INDEX telemetry_at ON telemetry(at)",
        ),
    ),
    Migration(
        3,
        "event idempotency keys",
        (
            # NULL for events without a key (API and admin events); UNIQUE lets any number of NULLs in.
            "ALTER TABLE events ADD COLUMN key TEXT",
            "CREATE UNIQUE INDEX events_key ON events(key)",
        ),
    ),
    Migration(
        4,
        "seq accounting kept per (board, epoch), gap epochs, history retention indexes",
        (
            *_SEQ_ACCOUNTING("INTEGER", "TEXT"),
            "CREATE INDEX heartbeats_at ON heartbeats(at)",
            "CREATE INDEX batches_received ON batches(received_at)",
        ),
    ),
    Migration(5, "calibration watch state", (_WATCH("INTEGER", "REAL", "TEXT"),)),
    Migration(6, "spool tails announced by heartbeats", _SPOOL_TAILS("INTEGER", "REAL", "TEXT")),
    Migration(7, "readings partitioned by day (PostgreSQL only)", ()),
    Migration(8, "seq holes marked once reported", _HOLES_REPORTED("INTEGER", "0", "1", "reported = 0")),
)


POSTGRES: tuple[Migration, ...] = (
    Migration(
        1,
        "boards, enrollment, tags, calibration, events, heartbeats, clock samples",
        (
            # smallint board ids: readings.board_id is smallint, which keeps a readings row at 56 bytes.
            """CREATE TABLE boards (
            id smallint GENERATED BY DEFAULT AS IDENTITY PRIMARY KEY,
            name text NOT NULL UNIQUE,
            room text NOT NULL,
            floor text,
            created_at float8 NOT NULL,
            enrolled_at float8,
            fingerprint text,
            offset_db float8 NOT NULL DEFAULT 0,
            retired_at float8,
            token_hash text UNIQUE,
            last_boot text,
            last_boot_at float8,
            readings_total bigint NOT NULL DEFAULT 0,
            batches_total bigint NOT NULL DEFAULT 0,
            gap_readings bigint NOT NULL DEFAULT 0,
            last_batch_at float8)""",
            """CREATE TABLE enrollments (
            code_hash text PRIMARY KEY,
            board_id smallint NOT NULL references boards(id),
            expires_at float8 NOT NULL,
            used_at float8)""",
            "CREATE INDEX enrollments_board ON enrollments(board_id)",
            """CREATE TABLE calibrations (
            id bigint GENERATED BY DEFAULT AS IDENTITY PRIMARY KEY,
            board_id smallint NOT NULL references boards(id),
            at float8 NOT NULL,
            offset_db float8 NOT NULL,
            spread_db float8 NOT NULL,
            samples integer NOT NULL,
            reference_tag text NOT NULL,
            distance_m float8 NOT NULL,
            fingerprint text)""",
            "CREATE INDEX calibrations_board ON calibrations(board_id, at)",
            """CREATE TABLE tags (
            id integer GENERATED BY DEFAULT AS IDENTITY PRIMARY KEY,
            tag text NOT NULL UNIQUE,
            added_at float8,
            retired_at float8)""",
            """CREATE TABLE events (
            id bigint GENERATED BY DEFAULT AS IDENTITY PRIMARY KEY,
            at float8 NOT NULL,
            board_id smallint references boards(id),
            kind text NOT NULL,
            detail text NOT NULL)""",
            "CREATE INDEX events_board ON events(board_id, id)",
            """CREATE TABLE heartbeats (
            id bigint GENERATED BY DEFAULT AS IDENTITY PRIMARY KEY,
            board_id smallint NOT NULL references boards(id),
            at float8 NOT NULL,
            boot text NOT NULL,
            stats text NOT NULL)""",
            "CREATE INDEX heartbeats_board_at ON heartbeats(board_id, at)",
            """CREATE TABLE clock_samples (
            id bigint GENERATED BY DEFAULT AS IDENTITY PRIMARY KEY,
            board_id smallint NOT NULL references boards(id),
            boot text NOT NULL,
            t1 float8 NOT NULL, t2 float8 NOT NULL, t3 float8 NOT NULL, t4 float8 NOT NULL)""",
            "CREATE INDEX clock_samples_board ON clock_samples(board_id, boot, t2)",
            "CREATE INDEX clock_samples_t2 ON clock_samples(t2)",
        ),
    ),
    Migration(
        2,
        "batches, readings, telemetry",
        (
            """CREATE TABLE batches (
            id bigint GENERATED BY DEFAULT AS IDENTITY PRIMARY KEY,
            board_id smallint NOT NULL references boards(id),
            epoch text NOT NULL,
            seq bigint NOT NULL CONSTRAINT seq_non_negative CHECK (seq >= 0),
            digest text NOT NULL,
            boot text NOT NULL,
            n integer NOT NULL,
            received_at float8 NOT NULL,
            offset_dd smallint NOT NULL,
            gap_first bigint,
            gap_last bigint,
            gap_readings bigint,
            gap_reason text,
            UNIQUE (board_id, epoch, seq))""",
            # Column order follows alignment (8-byte, then 4, then 2) so a row has no padding.
            # float8 compares NaN greater than every number, so the upper bound also keeps NaN out.
            """CREATE TABLE readings (
            t_collector float8 NOT NULL
                CONSTRAINT t_collector_finite CHECK (t_collector > '-Infinity' AND t_collector < 'Infinity'),
            t_board_ms bigint NOT NULL,
            batch_id bigint NOT NULL,
            tag_id integer NOT NULL,
            board_id smallint NOT NULL,
            rssi_dd smallint NOT NULL CONSTRAINT rssi_dd_range CHECK (rssi_dd BETWEEN -2000 AND 500))""",
            # BRIN: readings arrive roughly in collector-time order, so a block-range index answers time
            # ranges and retention at a tiny fraction of a b-tree's size and insert cost.
            "CREATE INDEX readings_t ON readings USING brin (t_collector) WITH (pages_per_range = 32)",
            """CREATE TABLE telemetry (
            id bigint GENERATED BY DEFAULT AS IDENTITY PRIMARY KEY,
            batch_id bigint NOT NULL references batches(id),
            board_id smallint NOT NULL,
            tag_id integer NOT NULL,
            at float8 NOT NULL,
            t_board_ms bigint NOT NULL,
            battery_mv float8, temperature_c float8, adv_count float8, uptime_s float8)""",
            "CREATE INDEX telemetry_tag ON telemetry(tag_id, at)",
            "CREATE INDEX telemetry_at ON telemetry(at)",
        ),
    ),
    Migration(
        3,
        "event idempotency keys, lock terms",
        (
            "ALTER TABLE events ADD COLUMN key text",
            "CREATE UNIQUE INDEX events_key ON events(key)",
            # The fencing term of each run-once lock: bumped by every collector that takes the lock, and
            # checked inside the transaction of every write made under it (postgres.py, `exclusive`).
            """CREATE TABLE leases (
            name text PRIMARY KEY,
            term bigint NOT NULL,
            holder text NOT NULL,
            taken_at timestamptz NOT NULL DEFAULT now())""",
        ),
    ),
    Migration(
        4,
        "seq accounting kept per (board, epoch), gap epochs, history retention indexes",
        (
            *_SEQ_ACCOUNTING("bigint", "text"),
            "CREATE INDEX heartbeats_at ON heartbeats(at)",
            # (board_id, at, id): the newest heartbeat of a board is one backward index step, ties included.
            "CREATE INDEX heartbeats_board_at_id ON heartbeats(board_id, at, id)",
            "DROP INDEX heartbeats_board_at",
            "CREATE INDEX batches_received ON batches(received_at)",
        ),
    ),
    Migration(5, "calibration watch state", (_WATCH("smallint", "double precision", "text"),)),
    Migration(6, "spool tails announced by heartbeats", _SPOOL_TAILS("bigint", "double precision", "text")),
    Migration(7, "readings partitioned by day (PostgreSQL only)", _READINGS_DAYS),
    Migration(
        8, "seq holes marked once reported", _HOLES_REPORTED("boolean", "false", "true", "NOT reported")
    ),
)

_VERSION_TABLE = "CREATE TABLE IF NOT EXISTS schema_version (version integer PRIMARY KEY, name text NOT NULL, applied_at text NOT NULL)"


def latest(migrations: tuple[Migration, ...]) -> int:
    """The version a fully migrated database has."""
    return max((m.version for m in migrations), default=0)


def _check_order(migrations: tuple[Migration, ...]) -> None:
    versions = [m.version for m in migrations]
    if versions != list(range(1, len(versions) + 1)):
        raise ValueError(f"migrations must be numbered 1..n in order, got {versions}")


def migrate_sqlite(
    con: sqlite3.Connection, migrations: tuple[Migration, ...] = SQLITE, upto: int | None = None
) -> int:
    """
    Bring a SQLite database (connection in autocommit mode) up to date.

    Args:
        con: a connection opened with ``isolation_level=None``; used from the calling thread only.
        migrations: the numbered steps (tests pass their own).
        upto: stop after this version (tests build an older database with it).

    Returns:
        The version the database is at afterwards.

    Raises:
        SchemaTooNew: the database has a version above the newest known migration.
    """
    _check_order(migrations)
    target = latest(migrations) if upto is None else upto
    con.execute("BEGIN IMMEDIATE")
    try:
        con.execute(_VERSION_TABLE)
        current = con.execute("SELECT coalesce(max(version), 0) FROM schema_version").fetchone()[0]
        con.execute("COMMIT")
    except BaseException:
        con.execute("ROLLBACK")
        raise
    if current > latest(migrations):
        raise SchemaTooNew(current, latest(migrations))
    new = current == 0  # a new database: made by the same migrations, logged once
    for m in migrations:
        if m.version <= current or m.version > target:
            continue
        con.execute("BEGIN IMMEDIATE")
        try:
            # Re-read inside the write lock: another process may have migrated meanwhile.
            now = con.execute("SELECT coalesce(max(version), 0) FROM schema_version").fetchone()[0]
            if now >= m.version:
                con.execute("COMMIT")
                continue
            started = _migrating(m, new=new)
            for stmt in m.statements:
                con.execute(stmt)
            con.execute(
                "INSERT INTO schema_version (version, name, applied_at) VALUES (?, ?, datetime('now'))",
                (m.version, m.name),
            )
            con.execute("COMMIT")
        except BaseException:
            con.execute("ROLLBACK")
            raise
        _migrated(m, started, new=new, last=m.version == target)
        current = m.version
    return current


def _migrating(m: Migration, *, new: bool) -> float:
    """Log the start of an existing database's migration (one may run for minutes on a large database);
    returns its start time. A new database is made by the same migrations and logged once, at the end."""
    if not new:
        log.info("schema_migrating", version=m.version, name=m.name)
    return time.monotonic()


def _migrated(m: Migration, started: float, *, new: bool, last: bool) -> None:
    if not new:
        log.info("schema_migrated", version=m.version, seconds=round(time.monotonic() - started, 3))
    elif last:
        log.info("schema_created", version=m.version)


# A fixed advisory-lock key so two collectors starting together migrate one after the other.
_MIGRATION_LOCK_KEY = 0x6C70_6D69_6772  # "lpmigr"
STATEMENT_MAX_SECONDS = 3600.0
"""Longest one PostgreSQL migration statement may run: moving a large table takes longer than the store's
per-statement timeout allows, and a collector that cannot finish a migration cannot start."""


async def migrate_postgres(
    con: Any, migrations: tuple[Migration, ...] = POSTGRES, upto: int | None = None
) -> int:
    """
    Bring a PostgreSQL schema (the connection's ``search_path``) up to date; see `migrate_sqlite`.

    ``con`` is an asyncpg connection. Each migration runs in its own transaction holding a
    transaction-scoped advisory lock, so collectors starting at once do not race.
    """
    _check_order(migrations)
    target = latest(migrations) if upto is None else upto
    async with con.transaction():
        await con.execute("SELECT pg_advisory_xact_lock($1)", _MIGRATION_LOCK_KEY)
        await con.execute(_VERSION_TABLE)
        current = await con.fetchval("SELECT coalesce(max(version), 0) FROM schema_version")
    if current > latest(migrations):
        raise SchemaTooNew(current, latest(migrations))
    new = current == 0  # a new database: made by the same migrations, logged once
    for m in migrations:
        if m.version <= current or m.version > target:
            continue
        async with con.transaction():
            await con.execute("SELECT pg_advisory_xact_lock($1)", _MIGRATION_LOCK_KEY)
            now = await con.fetchval("SELECT coalesce(max(version), 0) FROM schema_version")
            if now >= m.version:
                continue
            started = _migrating(m, new=new)
            for stmt in m.statements:
                await con.execute(stmt, timeout=STATEMENT_MAX_SECONDS)
            await con.execute(
                "INSERT INTO schema_version (version, name, applied_at) VALUES ($1, $2, now()::text)",
                m.version,
                m.name,
            )
        _migrated(m, started, new=new, last=m.version == target)
        current = m.version
    return current
