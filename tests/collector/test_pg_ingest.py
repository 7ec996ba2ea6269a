"""
The PostgreSQL store's two ways of storing a batch: the common case in one statement (the next seq of a
known epoch, no gap record, no telemetry) and the general transaction for everything else. Both must
leave the same rows; the common case must cost one round trip.
"""

from __future__ import annotations

import dataclasses
from typing import Any

import numpy as np
import pytest

from listenpost.collector.store import BadBatch, ClockSample, Heartbeat, IngestBatch, IngestStatus
from tests.collector.conftest import StoreFactory
from tests.collector.test_store import TAGS, _admin, add_boards, gap_record, make_batch

EPOCH_2 = "0badc0ffee0ddf00"
T = 1_800_000_000.0


def sampled(b: IngestBatch, boot: str, t2: float) -> IngestBatch:
    """``b`` with the clock exchange its request carried: of ``boot``, stamped ``t2`` by the collector."""
    return dataclasses.replace(b, clock=ClockSample(b.board, boot, 5.0, t2, t2 + 0.001, 5.01))


def boot_step(
    why: str, seq: int, received_at: float, boot: str, t2: float, content_boot: str = "boot-1"
) -> tuple[str, IngestBatch, str]:
    """A next seq of board f0-a whose request carried a sample of ``boot`` at ``t2``."""
    return why, sampled(make_batch("f0-a", seq, boot=content_boot, received_at=received_at), boot, t2), "fast"


# What each step is for, and which way the store takes it.
FORGET_BOOT = "forget-boot"
"""A step that sets the board's last_boot and last_boot_at to NULL (a board no contact has dated yet)."""
STEPS: list[tuple[str, Any, str]] = [
    ("first of an epoch, with a sample", sampled(make_batch("f0-a", 0), "boot-1", T + 10), "general"),
    ("next seq, same boot", sampled(make_batch("f0-a", 1), "boot-1", T + 20), "fast"),
    ("next seq, no sample", make_batch("f0-a", 2), "fast"),
    ("a seq past the next: a hole", sampled(make_batch("f0-a", 4), "boot-1", T + 40), "general"),
    ("the late seq filling it", sampled(make_batch("f0-a", 3), "boot-1", T + 41), "general"),
    ("next seq again", sampled(make_batch("f0-a", 5), "boot-1", T + 50), "fast"),
    ("a duplicate (its sample is kept)", sampled(make_batch("f0-a", 5), "boot-1", T + 51), "general"),
    ("a conflict", sampled(make_batch("f0-a", 5, salt="other"), "boot-1", T + 52), "general"),
    ("a gap record", gap_record("f0-a", 6, first=0, last=1, readings=40), "general"),
    (
        "next seq with telemetry",
        make_batch("f0-a", 7, telemetry=({"tag": TAGS[0], "t_ms": 7, "battery_mv": 2900},)),
        "general",
    ),
    # The boot the board last showed: the sample's note, then the batch's, for every order of the times
    # (the board's last contact before each step in brackets).
    boot_step(
        "[T+80] sample of another boot at the batch's time: the batch's boot", 8, T + 200, "boot-2", T + 200
    ),
    boot_step("[T+200] sample newer than the batch", 9, T + 300, "boot-3", T + 310),
    boot_step("[T+310] sample at the last contact's time, batch older", 10, T + 305, "boot-4", T + 310),
    boot_step("[T+310] sample older than the last contact, batch newer", 11, T + 400, "boot-5", T + 250),
    boot_step("[T+400] both older than the last contact", 12, T + 100, "boot-6", T + 90),
    boot_step(
        "[T+400] batch at the last contact's time, sample older", 13, T + 400, "boot-6", T + 390, "boot-a"
    ),
    ("", FORGET_BOOT, "f0-a"),
    boot_step("[none] sample older than the batch", 14, T + 500, "boot-7", T + 490),
    ("", FORGET_BOOT, "f0-a"),
    ("[none] no sample", make_batch("f0-a", 15, boot="boot-8", received_at=T + 600), "fast"),
    ("", FORGET_BOOT, "f0-a"),
    boot_step("[none] sample newer than the batch", 16, T + 700, "boot-9", T + 710),
    ("a new epoch", make_batch("f0-a", 0, epoch=EPOCH_2), "general"),
    ("its next seq", sampled(make_batch("f0-a", 1, epoch=EPOCH_2), "boot-1", T + 800), "fast"),
    ("another board, first batch, no sample", make_batch("f0-b", 0), "general"),
    ("next seq, no readings", make_batch("f0-b", 1, n=0), "fast"),
    ("next seq", make_batch("f0-b", 2), "fast"),
    # Readings go as 2-D arrays of 64-wide rows (postgres._as_grid): whole rows, and a padded last row.
    ("next seq, two full rows of readings", make_batch("f0-b", 3, n=128, t0=T + 1000), "fast"),
    ("next seq, three rows and one reading", make_batch("f0-b", 4, n=193, t0=T + 1000), "fast"),
]

# Every table ingest writes, rows in a fixed order, boards by name.
DUMPS = {
    "boards": "SELECT name, last_boot, last_boot_at, readings_total, batches_total, gap_readings, last_batch_at "
    "FROM boards ORDER BY name",
    "batches": "SELECT x.*, b.name FROM batches x JOIN boards b ON b.id = x.board_id ORDER BY x.id",
    "readings": "SELECT r.*, t.tag FROM readings r JOIN tags t ON t.id = r.tag_id "
    "ORDER BY r.batch_id, r.t_collector, r.t_board_ms",
    "clock_samples": "SELECT * FROM clock_samples ORDER BY id",
    "seq_reach": "SELECT * FROM seq_reach ORDER BY board_id, epoch",
    "seq_holes": "SELECT * FROM seq_holes ORDER BY board_id, epoch, first_seq",
    "telemetry": "SELECT * FROM telemetry ORDER BY id",
}


async def _dump(factory: StoreFactory) -> dict[str, list[tuple[Any, ...]]]:
    async with _admin(factory) as con:
        return {table: [tuple(r) for r in await con.fetch(sql)] for table, sql in DUMPS.items()}


async def _forget_boot(factory: StoreFactory, board: str) -> None:
    async with _admin(factory) as con:
        await con.execute("UPDATE boards SET last_boot = NULL, last_boot_at = NULL WHERE name = $1", board)


async def test_the_one_statement_and_the_general_path_leave_the_same_rows(
    pg_factory: StoreFactory, second_pg: StoreFactory
):
    """
    The same batches stored through `ingest` (the common case in one statement, the rest in the general
    transaction) and all through the general transaction: the same rows in every table ingest writes,
    and each batch went the way its case says.
    """
    fast, general = await pg_factory.open(), await second_pg.open()
    for store in (fast, general):
        await add_boards(store, "f0-a", "f0-b")
    # `general` stores every batch the general way; `fast` reports which of its batches went that way.
    general._store = general._store_batch  # type: ignore[method-assign]
    took_general: list[IngestBatch] = []
    store_batch = fast._store_batch

    async def spy(con: Any, b: IngestBatch, *rest: Any) -> Any:
        took_general.append(b)
        return await store_batch(con, b, *rest)

    fast._store_batch = spy  # type: ignore[method-assign]
    expected_general, statuses = [], []
    for why, step, way in STEPS:
        if step == FORGET_BOOT:
            for factory in (pg_factory, second_pg):
                await _forget_boot(factory, way)
            continue
        a, b = await fast.ingest(step), await general.ingest(step)
        assert a == b, why
        assert (await _dump(pg_factory))["boards"] == (await _dump(second_pg))["boards"], why
        statuses.append(a.status)
        if way == "general":
            expected_general.append(step)
    assert took_general == expected_general
    assert statuses.count(IngestStatus.DUPLICATE) == statuses.count(IngestStatus.CONFLICT) == 1
    got, want = await _dump(pg_factory), await _dump(second_pg)
    for table in DUMPS:
        assert got[table] == want[table], table
    assert len(got["readings"]) == 10 * 20 + 128 + 193 and len(got["clock_samples"]) == 16
    assert got["boards"][0][1:3] == ("boot-1", T + 800)


class _Sent:
    """The messages a client sends on a PostgreSQL connection, by type (frontend protocol: a type byte,
    an int32 length counting itself, the body)."""

    def __init__(self) -> None:
        self.types: list[str] = []
        self._buf = b""

    def feed(self, data: Any) -> None:
        self._buf += bytes(data)
        while len(self._buf) >= 5 and len(self._buf) >= 1 + (n := int.from_bytes(self._buf[1:5], "big")):
            self.types.append(chr(self._buf[0]))
            self._buf = self._buf[1 + n :]

    @property
    def round_trips(self) -> int:
        """Messages after which the client waits for the server: Sync, Flush, simple Query, CopyDone."""
        return sum(t in "SHQc" for t in self.types)

    def take(self) -> int:
        n = self.round_trips
        self.types.clear()
        return n

    @classmethod
    async def on(cls, store: Any) -> _Sent:
        """Watch what the client sends on the store's one pooled connection."""
        sent = cls()
        async with store._pool.acquire() as con:  # the pool's one connection
            transport = con._con._transport
        write, writelines = transport.write, transport.writelines
        transport.write = lambda data: (sent.feed(data), write(data))[1]
        transport.writelines = lambda bufs: (sent.feed(b"".join(bufs)), writelines(bufs))[1]
        return sent


async def test_the_common_case_costs_one_round_trip(pg_factory: StoreFactory):
    """
    A batch that is the next seq of its epoch, its tags interned and its day's partition known: one
    statement, one round trip, with or without the request's clock sample. What the one statement does
    not take costs more (the general transaction).
    """
    store = await pg_factory.open(min_size=1, max_size=1)
    await add_boards(store, "r0-a")
    # The first use of each statement on the connection also prepares it (one more round trip).
    for seq in range(3):
        b = make_batch("r0-a", seq)
        await store.ingest(sampled(b, "boot-1", b.received_at) if seq == 1 else b)
    sent = await _Sent.on(store)

    b = make_batch("r0-a", 3)
    assert (await store.ingest(sampled(b, "boot-1", b.received_at))).status is IngestStatus.STORED
    assert sent.take() == 1
    assert (await store.ingest(make_batch("r0-a", 4))).status is IngestStatus.STORED
    assert sent.take() == 1
    # A seq past the next: the one statement declines (changing nothing), the general transaction stores it.
    assert (await store.ingest(make_batch("r0-a", 6))).status is IngestStatus.STORED
    assert sent.take() > 3


async def test_a_heartbeat_costs_one_round_trip_and_keeps_everything_it_did(pg_factory: StoreFactory):
    """
    A heartbeat with or without a clock sample is one statement (its own commit): the heartbeat, the
    sample, the trim to the history, the spool's announced seq and the board's boot and spool epoch. An
    unknown board is refused with its name and nothing is stored.
    """
    store = await pg_factory.open(min_size=1, max_size=1, heartbeat_history=2)
    await add_boards(store, "r1-a")
    await store.ingest(make_batch("r1-a", 0, epoch="0a0b0c0d0e0f1011"))
    spool = {"spool": {"epoch": "0a0b0c0d0e0f1011", "next_seq": 5}}
    for i in range(2):  # the first use of each statement on the connection also prepares it
        await store.add_heartbeat(Heartbeat("r1-a", T + i, "boot-1", {"i": i}))
        await store.add_heartbeat(
            Heartbeat("r1-a", T + 2 + i, "boot-1", {"i": i}),
            clock=ClockSample("r1-a", "boot-1", 1.0, T, T, 1.1),
        )
    sent = await _Sent.on(store)

    sample = ClockSample("r1-a", "boot-2", 3.0, T + 10, T + 10, 3.1)
    await store.add_heartbeat(Heartbeat("r1-a", T + 9, "boot-1", {"n": 9, **spool}), clock=sample)
    assert sent.take() == 1
    await store.add_heartbeat(Heartbeat("r1-a", T + 8, "boot-1", {"n": 8}))
    assert sent.take() == 1
    assert [h.stats["n"] for h in await store.heartbeats("r1-a", 0.0)] == [8, 9]  # the newest two by time
    assert await store.clock_samples("r1-a", "boot-2") == [sample]
    # The sample (t2 = T + 10) is the board's latest contact: its boot stays over the later-sent but
    # earlier-stamped heartbeats.
    assert {c.board: c for c in await store.board_counts()}["r1-a"].last_boot == "boot-2"
    async with _admin(pg_factory) as con:
        assert await con.fetchval("SELECT announced FROM seq_reach") == 4
        assert await con.fetchval("SELECT spool_epoch FROM boards") == "0a0b0c0d0e0f1011"
    with pytest.raises(ValueError, match="r9-x"):
        await store.add_heartbeat(Heartbeat("r9-x", T, "boot-1", {}))


@pytest.mark.parametrize("rssi", [9_999, 40_000], ids=["past-the-check", "past-smallint"])
async def test_a_refused_next_seq_names_the_field_and_changes_nothing(pg_factory: StoreFactory, rssi: int):
    """A next seq whose readings the schema refuses (its CHECK, or beyond the column's type) is a BadBatch
    naming rssi_dd; nothing of it is stored, and the corrected batch then goes in under the same key."""
    store = await pg_factory.open()
    await add_boards(store, "e0-a")
    await store.ingest(make_batch("e0-a", 0))
    before = await _dump(pg_factory)
    bad = make_batch("e0-a", 1, rssi=np.array([-700] * 9 + [rssi]))
    with pytest.raises(BadBatch) as e:
        await store.ingest(sampled(bad, "boot-1", bad.received_at))
    assert e.value.field == "rssi_dd"
    assert await _dump(pg_factory) == before
    good = make_batch("e0-a", 1)
    assert (await store.ingest(sampled(good, "boot-1", good.received_at))).status is IngestStatus.STORED
