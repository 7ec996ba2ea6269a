"""
What both store backends share: the checks a batch passes before it reaches the database, the SQL
that is the same text in both dialects, and the conversions from database rows to the store's values.

Not part of the `Store` interface; only ``sqlite.py`` and ``postgres.py`` import it.
"""

from __future__ import annotations

import itertools
import json
import math
from collections.abc import Awaitable, Callable, Sequence
from typing import Any

import numpy as np

from listenpost.collector.store import BadBatch, Board, Calibration, ClockSample, IngestBatch, WatchBaseline
from listenpost.core.wire import EPOCH

READING_COPY_COLUMNS = ["t_collector", "t_board_ms", "batch_id", "tag_id", "board_id", "rssi_dd"]
"""The readings columns in the order the PostgreSQL store COPYs them (the ingest bench's anchor does the same)."""

BOARD_COLS = "name, room, floor, created_at, enrolled_at, fingerprint, offset_db, retired_at"
"""The `Board` columns, in the order `board_from_row` reads them."""

# Readings are what the caller counts; telemetry ages out on the same cut.
RETENTION_TABLES: tuple[tuple[str, str, bool], ...] = (
    ("readings", "t_collector", True),
    ("telemetry", "at", False),
)

# History that ages out on its own cut (`Store.delete_history_before`): rows of table ``x`` older than
# ``{cut}``, except what later work needs: a board's newest heartbeat (the status page), the newest
# clock sample of each (board, boot) (a model rebuilt after a restart), the newest batch of each (board,
# epoch) and any batch telemetry still points at. Each condition is driven by an index on the time
# column and one index probe per row.
HISTORY_TABLES: dict[str, str] = {
    "heartbeats": "x.at < {cut} AND x.id <> (SELECT k.id FROM heartbeats k WHERE k.board_id = x.board_id "
    "ORDER BY k.at DESC, k.id DESC LIMIT 1)",
    "clock_samples": "x.t2 < {cut} AND x.id <> (SELECT k.id FROM clock_samples k WHERE k.board_id = x.board_id "
    "AND k.boot = x.boot ORDER BY k.t2 DESC, k.id DESC LIMIT 1)",
    "batches": "x.received_at < {cut} AND x.seq < (SELECT max(k.seq) FROM batches k WHERE k.board_id = x.board_id "
    "AND k.epoch = x.epoch) AND NOT EXISTS (SELECT 1 FROM telemetry k WHERE k.batch_id = x.id)",
}

# The latest telemetry row per tag. ``{where}`` is a backend-specific tag filter (or empty).
LATEST_TELEMETRY_SQL = (
    "SELECT tg.tag, b.name, t.at, t.t_board_ms, t.battery_mv, t.temperature_c, t.adv_count, t.uptime_s "
    "FROM (SELECT *, row_number() OVER (PARTITION BY tag_id ORDER BY at DESC, t_board_ms DESC, id DESC) AS k "
    "      FROM telemetry {where}) t "
    "JOIN tags tg ON tg.id = t.tag_id JOIN boards b ON b.id = t.board_id WHERE t.k = 1"
)


# Where each board's applied offset changed, in batch id order: readings carry their batch id, and a
# board's offset changes rarely, so these few rows give every reading's offset without a join per row.
OFFSET_CHANGES_SQL = (
    "SELECT board_id, id, offset_dd FROM (SELECT board_id, id, offset_dd, "
    "lag(offset_dd) OVER (PARTITION BY board_id ORDER BY id) AS prev FROM batches) x "
    "WHERE prev IS NULL OR prev <> offset_dd ORDER BY board_id, id"
)


class OffsetChanges:
    """
    The applied offset of any stored reading, from `OFFSET_CHANGES_SQL`'s rows (board id, batch id, offset).

    A reading's offset is its batch's: the last change of its board at or before its batch id.
    """

    def __init__(self, rows: Sequence[Sequence[int]]) -> None:
        arr = np.array(rows, dtype=np.int64).reshape(-1, 3)
        self._keys = self._key(arr[:, 0], arr[:, 1])
        self._boards = arr[:, 0]
        self._offsets = arr[:, 2].astype(np.int32)

    @staticmethod
    def _key(board_id: np.ndarray, batch_id: np.ndarray) -> np.ndarray:
        # board ids are small (smallint) and batch ids below 2**47: one sortable int64 key.
        return (np.asarray(board_id, dtype=np.int64) << 47) | np.asarray(batch_id, dtype=np.int64)

    def lookup(self, board_id: np.ndarray, batch_id: np.ndarray) -> np.ndarray:
        """int32 offset (tenths of a dB) per reading.

        Raises:
            ValueError: a reading whose board has no stored batch (its offset is unknown).
        """
        i = np.searchsorted(self._keys, self._key(board_id, batch_id), side="right") - 1
        ok = (i >= 0) & (self._boards[np.maximum(i, 0)] == board_id) if self._keys.size else i >= 0
        if not np.all(ok):
            raise ValueError("readings whose batch header is gone: their applied offset is unknown")
        return self._offsets[i]


def json_text(obj: dict[str, Any] | None) -> str | None:
    """A JSON column's text (keys sorted, so equal dicts store equal text), or NULL."""
    return None if obj is None else json.dumps(obj, sort_keys=True)


def board_from_row(row: Sequence[Any]) -> Board:
    """A `Board` from the `BOARD_COLS` of one row."""
    name, room, floor, created_at, enrolled_at, fp, offset_db, retired_at = row
    return Board(
        name, room, floor, created_at, enrolled_at, json.loads(fp) if fp else None, offset_db, retired_at
    )


def calibration_from_row(row: Sequence[Any]) -> Calibration:
    """A `Calibration` from (board name, at, offset, spread, samples, reference tag, distance, fingerprint)."""
    *values, fp = row
    return Calibration(*values, json.loads(fp) if fp else None)


WATCH_COLS = "marker, baseline_from, levels, shift_since, raised"
"""The columns of ``watch_baselines`` after ``board_id``, in `watch_row` order."""


def watch_row(w: WatchBaseline) -> tuple[Any, ...]:
    """The `WATCH_COLS` values of one board's watch state."""
    return (w.marker, w.baseline_from, json_text(w.levels), w.shift_since, w.raised)


def watch_from_row(board: str, row: Sequence[Any]) -> WatchBaseline:
    """A `WatchBaseline` from the board's name and the `WATCH_COLS` of its row."""
    marker, baseline_from, levels, since, raised = row
    return WatchBaseline(board, marker, baseline_from, json.loads(levels), since, bool(raised))


def check_clock_sample(s: ClockSample) -> None:
    """
    Raises:
        ValueError: one of t1..t4 is not finite.
    """
    if not all(math.isfinite(v) for v in (s.t1, s.t2, s.t3, s.t4)):
        raise ValueError(f"clock sample t1..t4 must be finite, got {(s.t1, s.t2, s.t3, s.t4)!r}")


def constraint_field(constraint: str) -> str:
    """The batch field a CHECK constraint guards: ``rssi_dd_range`` -> ``rssi_dd``."""
    return constraint.removesuffix("_range").removesuffix("_non_negative").removesuffix("_finite") or "batch"


def check_chunks(chunk: int, max_chunks: int | None) -> None:
    """
    Raises:
        ValueError: ``chunk`` or ``max_chunks`` below 1.
    """
    if chunk < 1:
        raise ValueError(f"chunk must be >= 1, got {chunk!r}")
    if max_chunks is not None and max_chunks < 1:
        raise ValueError(f"max_chunks must be >= 1 or None, got {max_chunks!r}")


async def delete_in_chunks(
    delete_chunk: Callable[[str, str], Awaitable[int]], chunk: int, max_chunks: int | None
) -> int:
    """
    Run ``delete_chunk(table, time_column)`` over `RETENTION_TABLES` until a chunk comes back short.

    Args:
        delete_chunk: deletes at most ``chunk`` old rows of one table in its own short transaction,
            returns how many it deleted.
        chunk: rows per statement.
        max_chunks: statements per table at most (``None``: until done).

    Returns:
        Readings deleted.

    Raises:
        ValueError: ``chunk`` or ``max_chunks`` below 1.
    """
    check_chunks(chunk, max_chunks)
    total = 0
    for table, col, count in RETENTION_TABLES:
        for _ in itertools.count() if max_chunks is None else range(max_chunks):
            n = await delete_chunk(table, col)
            if count:
                total += n
            if n < chunk:
                break
    return total


async def delete_history_in_chunks(
    delete_chunk: Callable[[str, float], Awaitable[int]],
    cuts: dict[str, float | None],
    chunk: int,
    max_chunks: int | None,
) -> dict[str, int]:
    """
    Run ``delete_chunk(table, cut)`` over the `HISTORY_TABLES` that have a cut, until a chunk comes back short.

    Returns:
        Rows deleted per table.

    Raises:
        ValueError: ``chunk`` or ``max_chunks`` below 1, or a table that is not in `HISTORY_TABLES`.
    """
    check_chunks(chunk, max_chunks)
    unknown = set(cuts) - HISTORY_TABLES.keys()
    if unknown:
        raise ValueError(f"no history retention for {sorted(unknown)}")
    done: dict[str, int] = {}
    for table, cut in cuts.items():
        if cut is None:
            continue
        done[table] = 0
        for _ in itertools.count() if max_chunks is None else range(max_chunks):
            n = await delete_chunk(table, cut)
            done[table] += n
            if n < chunk:
                break
    return done


def check_batch(batch: IngestBatch) -> int:
    """
    Check a batch's shape before it reaches the database; returns its offset in tenths of a dB.

    Value ranges (``rssi_dd``, ``seq``) are left to the schema's CHECK constraints, the last line behind
    the API's validation; a violation there rolls the batch back whole.

    Raises:
        BadBatch: naming the field.
    """
    for name in ("board", "boot", "epoch", "digest"):
        v = getattr(batch, name)
        if not isinstance(v, str) or not v:
            raise BadBatch(name, f"must be a non-empty string, got {v!r}")
    if not isinstance(batch.seq, int) or isinstance(batch.seq, bool):
        raise BadBatch("seq", f"must be an integer, got {batch.seq!r}")
    n = len(batch.t_board_ms)
    for name in ("tags", "t_collector", "rssi_dd"):
        if len(getattr(batch, name)) != n:
            raise BadBatch(name, f"has {len(getattr(batch, name))} entries, t_board_ms has {n}")
    if n and not np.all(np.isfinite(np.asarray(batch.t_collector, dtype=np.float64))):
        raise BadBatch("t_collector", "must be finite")
    if batch.gap is not None:
        if n:
            raise BadBatch("gap", "a gap record carries no readings")
        ep = batch.gap.get("epoch")
        if ep is not None and (not isinstance(ep, str) or not EPOCH.fullmatch(ep)):
            raise BadBatch("gap.epoch", f"must be an epoch (8-32 lower-case hex characters), got {ep!r}")
        for k in ("first_seq", "last_seq", "readings"):
            v = batch.gap.get(k)
            if not isinstance(v, int) or isinstance(v, bool) or v < 0:
                raise BadBatch(f"gap.{k}", f"must be a non-negative integer, got {v!r}")
        if batch.gap["last_seq"] < batch.gap["first_seq"]:
            raise BadBatch("gap.last_seq", "must be >= first_seq")
    for i, t in enumerate(batch.telemetry):
        if not isinstance(t, dict) or not isinstance(t.get("tag"), str) or not t["tag"]:
            raise BadBatch(f"telemetry[{i}].tag", "must be a tag identity string")
        if not isinstance(t.get("t_ms"), int) or isinstance(t.get("t_ms"), bool):
            raise BadBatch(f"telemetry[{i}].t_ms", f"must be an integer, got {t.get('t_ms')!r}")
    if batch.clock is not None:
        if batch.clock.board != batch.board:
            raise BadBatch("clock", f"sample of board {batch.clock.board!r} in a batch of {batch.board!r}")
        try:
            check_clock_sample(batch.clock)
        except ValueError as e:
            raise BadBatch("clock", str(e)) from e
    if not np.isfinite(batch.offset_db):
        raise BadBatch("offset_db", f"must be finite, got {batch.offset_db!r}")
    return round(batch.offset_db * 10)


def batch_tag_names(batch: IngestBatch) -> set[str]:
    """Every tag identity a batch mentions (readings and telemetry)."""
    # A set of the str objects, not np.unique: sorting an object array costs ~10x more (and runs on the
    # single writer thread, which is what ingest throughput waits on).
    names = set(batch.tags.tolist())
    names.update(t["tag"] for t in batch.telemetry)
    return names


def reading_tag_ids(batch: IngestBatch, tag_ids: dict[str, int]) -> list[int]:
    """The interned id of every reading's tag, in reading order (a dict lookup each, no sort)."""
    return list(map(tag_ids.__getitem__, batch.tags.tolist()))


TELEMETRY_FIELDS = ("battery_mv", "temperature_c", "adv_count", "uptime_s")


def gap_epoch(batch: IngestBatch) -> str:
    """The epoch a gap record's seq range belongs to: its own ``epoch`` field, else the batch's."""
    return (batch.gap or {}).get("epoch") or batch.epoch


BATCH_COLS = (
    "board_id", "epoch", "seq", "digest", "boot", "n", "received_at", "offset_dd",
    "gap_first", "gap_last", "gap_readings", "gap_reason", "gap_epoch",
)  # fmt: skip
"""The columns of a stored batch row, in the order of `batch_row`."""


def batch_row(batch: IngestBatch, board_id: int, offset_dd: int) -> tuple[Any, ...]:
    """A batch's row for `BATCH_COLS` (both stores insert it, each in its own placeholder style)."""
    gap = batch.gap or {}
    return (
        board_id,
        batch.epoch,
        batch.seq,
        batch.digest,
        batch.boot,
        batch.n,
        batch.received_at,
        offset_dd,
        gap.get("first_seq"),
        gap.get("last_seq"),
        gap.get("readings"),
        gap.get("reason"),
        gap_epoch(batch) if batch.gap is not None else None,
    )


# Seq holes now (board, epoch, first, last, tail): the runs inside each epoch's span that ingest keeps in
# ``seq_holes``, and the tails of epochs a board has left. A tail is the seqs a board's heartbeats said
# its spool had sealed (``announced``) beyond the last one covered, in an epoch that is no longer the
# board's spool epoch, once a batch of that newer epoch has arrived. The agent sends its spool oldest
# first, one request at a time, so by then every batch of the old epoch it still held has been sent (or
# dead-lettered, which a gap record covers): what is missing is lost. Both parts read one small table
# (rows per hole and per epoch), so the cost does not follow the history kept. ``{board}`` is a backend's
# ``AND b.name = <param>`` or empty; ``{open}`` its test for runs not yet marked reported (the predicate of
# the partial index seq_holes_open) or empty. Tails are not stored, so they have no mark: few, one per
# epoch a board left with batches unsent.
SEQ_HOLES_SQL = (
    "SELECT b.name, h.epoch, h.first_seq, h.last_seq, 0 AS tail FROM seq_holes h "
    "JOIN boards b ON b.id = h.board_id WHERE 1 = 1 {board} {open} "
    "UNION ALL "
    "SELECT b.name, r.epoch, r.reach + 1, r.announced, 1 FROM seq_reach r JOIN boards b ON b.id = r.board_id "
    "WHERE r.announced > r.reach AND b.spool_epoch <> r.epoch {board} AND EXISTS (SELECT 1 FROM seq_reach c "
    "WHERE c.board_id = r.board_id AND c.epoch = b.spool_epoch) "
    "ORDER BY 1, 2, 3"
)

# The most a heartbeat may announce: seqs are sqlite/PostgreSQL 64-bit integers, and JSON numbers beyond
# 2**53 are not exact.
_MAX_SEQ = 2**53


def spool_mark(stats: dict[str, Any]) -> tuple[str, int | None] | None:
    """
    What a heartbeat says of its board's spool: (epoch, highest seq sealed so far, or None before the first).

    None when the heartbeat carries no usable spool figures (an older agent, a spool that could never be
    opened, or values that are not an epoch and a seq): the heartbeat is stored all the same, it only
    announces nothing.
    """
    spool = stats.get("spool")
    if not isinstance(spool, dict):
        return None
    epoch, next_seq = spool.get("epoch"), spool.get("next_seq")
    if not isinstance(epoch, str) or not EPOCH.fullmatch(epoch):
        return None
    if isinstance(next_seq, bool) or not isinstance(next_seq, int) or not 0 <= next_seq <= _MAX_SEQ:
        return None
    return epoch, (next_seq - 1 if next_seq > 0 else None)


def seq_intervals(batch: IngestBatch) -> list[tuple[str, int, int]]:
    """The (epoch, first, last) seq ranges a newly stored batch covers, sorted (the lock order on PostgreSQL)."""
    out = [(batch.epoch, batch.seq, batch.seq)]
    if batch.gap is not None:
        out.append((gap_epoch(batch), batch.gap["first_seq"], batch.gap["last_seq"]))
    return sorted(out)


def pieces_reported(old: Sequence[tuple[int, int, bool]], new: Sequence[tuple[int, int]]) -> list[bool]:
    """
    Whether each hole `cover_seqs` returned is part of an ``old`` hole already reported as a loss: what is
    left of a reported hole after a late batch was reported with it, so the monitor does not read it again.
    """
    return [any(r and a <= x and y <= b for a, b, r in old) for x, y in new]


def cover_seqs(
    first: int, reach: int, lo: int, hi: int, overlapping: Sequence[tuple[int, int]]
) -> tuple[int, int, list[tuple[int, int]]]:
    """
    Account one covered range [lo, hi] of a (board, epoch) whose seqs so far span [first, reach].

    ``overlapping`` are the stored holes that meet [lo, hi] (only needed when it meets [first, reach]).
    Returns the new span and the holes to store in place of ``overlapping``: what is left of them, plus
    a new hole between the span and a range beyond it. Same result as the full scan
    (migrations.HOLES_SCAN): a hole is a maximal run of seqs inside the span that nothing covered.
    """
    holes: list[tuple[int, int]] = []
    for a, b in overlapping:
        if a < lo:
            holes.append((a, lo - 1))
        if b > hi:
            holes.append((hi + 1, b))
    if lo > reach + 1:
        holes.append((reach + 1, lo - 1))
    if hi < first - 1:
        holes.append((hi + 1, first - 1))
    return min(first, lo), max(reach, hi), holes
