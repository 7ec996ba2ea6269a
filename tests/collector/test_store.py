"""The collector store: one suite over both backends (real SQLite files, the real PostgreSQL server)."""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import random
import sqlite3

import numpy as np
import pytest

from listenpost.collector.store import (
    BadBatch,
    Board,
    Calibration,
    ClockSample,
    Enrollment,
    EnrollmentReason,
    EnrollmentRefused,
    Event,
    Heartbeat,
    IngestBatch,
    IngestStatus,
    SchemaTooNew,
    SeqHole,
    StoreUnavailable,
    open_store,
)
from listenpost.collector.store import migrations as mig
from listenpost.core import wire
from tests.collector.conftest import PG_URL, StoreFactory, require_pg

# Demo venue (docs/demo-venue.md): Brackenford Science Centre.
TAGS = [
    "ibeacon:4d2a0c1e-7f3b-4c55-9e61-2b8f0a7d3c10:7:42",
    "eddystone:8b0ca750e7a74e14bd99:00000000001e",
    "lpx:00000007",
    "mac:C4:7A:10:00:2B:91",
]


def make_batch(
    board: str,
    seq: int,
    *,
    epoch: str = "a1b2c3d4e5f60718",
    n: int = 10,
    t0: float = 1_800_000_000.0,
    tags: list[str] = TAGS,
    boot: str = "boot-1",
    received_at: float | None = None,
    offset_db: float = 2.5,
    rssi: np.ndarray | None = None,
    gap: dict | None = None,
    telemetry: tuple = (),
    salt: str = "",
) -> IngestBatch:
    """A batch whose readings are 1 s apart from ``t0 + seq * n``; the digest is the wire digest of its content."""
    start = t0 + seq * n
    t_col = start + np.arange(n, dtype=np.float64)
    tag_col = np.array([tags[(seq + i) % len(tags)] for i in range(n)], dtype=object)
    rssi_col = (np.arange(n, dtype=np.int32) % 300 - 900) if rssi is None else rssi
    t_board = (np.arange(n, dtype=np.int64) + seq * n) * 1000
    content = {
        "boot": boot,
        "offset_db": offset_db,
        "gap": gap,
        "salt": salt,
        "readings": {
            "t": t_board.tolist(),
            "tag": tag_col.tolist(),
            "rssi_dd": np.asarray(rssi_col).tolist(),
        },
        "telemetry": list(telemetry),
    }
    return IngestBatch(
        board=board,
        boot=boot,
        epoch=epoch,
        seq=seq,
        digest=wire.digest(content),
        received_at=start + n if received_at is None else received_at,
        offset_db=offset_db,
        tags=tag_col,
        t_board_ms=t_board,
        t_collector=t_col,
        rssi_dd=rssi_col,
        telemetry=telemetry,
        gap=gap,
    )


def gap_record(board: str, seq: int, first: int, last: int, readings: int, **kw) -> IngestBatch:
    return make_batch(
        board,
        seq,
        n=0,
        gap={"first_seq": first, "last_seq": last, "readings": readings, "reason": "spool_full"},
        **kw,
    )


async def add_boards(store, *names: str, at: float = 1_799_999_000.0) -> None:
    for name in names:
        await store.add_board(
            Board(name, "G0 Foyer", "ground", at), Enrollment(name, f"code-{name}", at + 3600)
        )


async def total_readings(store) -> int:
    return len((await store.readings(-np.inf, np.inf)).t_collector)


# -- boards, enrollment, calibration -----------------------------------------------------------------------


async def test_board_and_enrollment_lifecycle_survives_reopen(store_factory: StoreFactory):
    """Boards, one-time codes, tokens, retirement and calibration history are kept and survive a reopen."""
    store = await store_factory.open()
    t = 1_800_000_000.0
    await store.add_board(
        Board("g3-a", "G3 Light and Colour", "ground", t), Enrollment("g3-a", "h-code-1", t + 3600)
    )
    with pytest.raises(ValueError, match="g3-a"):
        await store.add_board(Board("g3-a", "elsewhere", None, t), Enrollment("g3-a", "h-code-x", t + 3600))
    assert await store.get_enrollment("h-code-x") is None
    assert await store.get_enrollment("h-code-1") == Enrollment("g3-a", "h-code-1", t + 3600, None)

    # A reissued code replaces the unused one.
    await store.new_enrollment(Enrollment("g3-a", "h-code-2", t + 7200))
    assert await store.get_enrollment("h-code-1") is None
    with pytest.raises(EnrollmentRefused) as e:
        await store.complete_enrollment("h-code-1", "tok-1", {"machine_id": "m1"}, t + 10)
    assert e.value.reason is EnrollmentReason.UNKNOWN
    with pytest.raises(EnrollmentRefused) as e:
        await store.complete_enrollment("h-code-2", "tok-1", {"machine_id": "m1"}, t + 7201)
    assert e.value.reason is EnrollmentReason.EXPIRED

    board = await store.complete_enrollment("h-code-2", "tok-1", {"machine_id": "m1"}, t + 20)
    assert (board.name, board.enrolled_at, board.fingerprint) == ("g3-a", t + 20, {"machine_id": "m1"})
    with pytest.raises(EnrollmentRefused) as e:
        await store.complete_enrollment("h-code-2", "tok-2", {"machine_id": "m2"}, t + 30)
    assert e.value.reason is EnrollmentReason.USED
    assert (await store.board_for_token("tok-1")).name == "g3-a"
    assert await store.board_for_token("tok-2") is None

    await store.set_offset(Calibration("g3-a", t + 100, 2.5, 0.8, 120, TAGS[0], 1.0, {"machine_id": "m1"}))
    await store.set_offset(Calibration("g3-a", t + 200, -1.5, 0.6, 90, TAGS[0], 2.0))
    await add_boards(store, "u3-a")
    assert await store.retire_board("u3-a", t + 300) is True
    assert await store.retire_board("u3-a", t + 400) is False
    assert await store.retire_board("nope", t + 400) is False
    await store.close()

    store = await store_factory.open()
    assert [b.name for b in await store.list_boards()] == ["g3-a", "u3-a"]
    assert [b.name for b in await store.list_boards(include_retired=False)] == ["g3-a"]
    g3 = await store.get_board("g3-a")
    assert (g3.offset_db, g3.room, g3.floor) == (-1.5, "G3 Light and Colour", "ground")
    assert (await store.get_board("u3-a")).retired_at == t + 300
    assert [(c.at, c.offset_db, c.fingerprint) for c in await store.calibrations("g3-a")] == [
        (t + 100, 2.5, {"machine_id": "m1"}),
        (t + 200, -1.5, None),
    ]
    assert (await store.get_enrollment("h-code-2")).used_at == t + 20
    assert await store.get_board("nope") is None


async def test_concurrent_enrollments_with_one_code_succeed_once(store):
    """Two racing enrollments with the same code: exactly one wins, the other is told the code was used."""
    await add_boards(store, "g1-a")
    results = await asyncio.gather(
        *[store.complete_enrollment("code-g1-a", f"tok-{i}", {"i": i}, 1_799_999_100.0) for i in range(5)],
        return_exceptions=True,
    )
    assert sum(not isinstance(r, Exception) for r in results) == 1
    assert all(r.reason is EnrollmentReason.USED for r in results if isinstance(r, Exception))


# -- tags ---------------------------------------------------------------------------------------------------


async def test_tags_import_is_idempotent_and_retire_reactivates(store):
    """Importing twice adds nothing; retired tags leave the list and come back when imported again."""
    assert await store.add_tags(TAGS, 1.0) == 4
    assert await store.add_tags(TAGS + TAGS[:2], 2.0) == 0
    assert await store.list_tags() == sorted(TAGS)
    assert await store.retire_tags([TAGS[0], TAGS[1], "mac:00:00:00:00:00:01"], 3.0) == 2
    assert await store.retire_tags([TAGS[0]], 4.0) == 0
    assert await store.list_tags() == sorted(TAGS[2:])
    assert await store.list_tags(include_retired=True) == sorted(TAGS)
    assert await store.add_tags([TAGS[0], "lpx:00000008"], 5.0) == 2
    assert await store.list_tags() == sorted([*TAGS[2:], TAGS[0], "lpx:00000008"])

    # Tags only seen in readings are interned for storage but not registered.
    await add_boards(store, "g0-a")
    await store.ingest(make_batch("g0-a", 0, tags=["mac:AA:BB:CC:DD:EE:01"]))
    assert "mac:AA:BB:CC:DD:EE:01" not in await store.list_tags(include_retired=True)


# -- ingest -------------------------------------------------------------------------------------------------


async def test_ingest_stored_duplicate_conflict_across_reopen(store_factory: StoreFactory):
    """Same key + same digest is a duplicate that stores nothing; other digest is a conflict; keys survive reopen."""
    store = await store_factory.open()
    await add_boards(store, "g0-a", "g0-b")
    first = make_batch("g0-a", 7)
    assert (await store.ingest(first)).status is IngestStatus.STORED
    assert (await store.ingest(first)).status is IngestStatus.DUPLICATE
    # Same (epoch, seq) on another board is another key.
    assert (await store.ingest(make_batch("g0-b", 7))).status is IngestStatus.STORED
    await store.close()

    store = await store_factory.open()
    res = await store.ingest(make_batch("g0-a", 7, salt="reused seq after a lost seal"))
    assert (res.status, res.stored_digest) == (IngestStatus.CONFLICT, first.digest)
    assert (await store.ingest(first)).status is IngestStatus.DUPLICATE
    # A new epoch starts a fresh sequence space.
    assert (await store.ingest(make_batch("g0-a", 7, epoch="0f0e0d0c0b0a0908"))).status is IngestStatus.STORED
    counts = {c.board: c for c in await store.board_counts()}
    assert (counts["g0-a"].readings_total, counts["g0-a"].batches_total) == (20, 2)
    assert counts["g0-a"].last_batch_at == first.received_at
    assert await total_readings(store) == 30
    assert counts["g0-a"].last_boot == "boot-1"


async def test_batch_failing_midway_stores_nothing_but_its_group_neighbours_are_kept(
    store_factory: StoreFactory,
):
    """A bad row in the middle rolls its batch back whole; batches committed with it are stored."""
    store = await store_factory.open()
    await add_boards(store, "g0-a", "g1-a", "g2-a")
    bad_rssi = np.full(10, -700, dtype=np.int32)
    bad_rssi[6] = 9_999  # past the schema's range: the insert fails after six rows went in
    batches = [
        make_batch("g0-a", 0),
        make_batch("g1-a", 0),
        make_batch("g2-a", 0, rssi=bad_rssi),
        make_batch("g0-a", 1),
        make_batch("g1-a", 1),
    ]
    results = await asyncio.gather(*[store.ingest(b) for b in batches], return_exceptions=True)
    assert isinstance(results[2], BadBatch) and results[2].field == "rssi_dd"
    assert [r.status for i, r in enumerate(results) if i != 2] == [IngestStatus.STORED] * 4
    if store_factory.backend == "sqlite":
        assert store.ingest_commits == 1  # all five went through one group transaction
    assert await total_readings(store) == 40
    counts = {c.board: c for c in await store.board_counts()}
    assert (counts["g2-a"].readings_total, counts["g2-a"].batches_total) == (0, 0)

    # Nothing half-written: the corrected batch goes in under the same key.
    assert (await store.ingest(make_batch("g2-a", 0))).status is IngestStatus.STORED
    assert await total_readings(store) == 50


@pytest.mark.parametrize(
    ("poison", "sqlite_keeps_it"),
    [
        # A NUL: SQLite's JSON text turned it into another string, so its tag id was missing (KeyError).
        # SQLite binds it as it is and keeps that batch; PostgreSQL text refuses it.
        ({"tags": ["ibeacon:\x00" + TAGS[0][8:]]}, True),
        ({"tags": ["lpx:\ud800"]}, False),  # a lone surrogate: no driver can encode it
        ({"telemetry": ({"tag": TAGS[0], "t_ms": 2**70},)}, False),  # past a 64-bit integer
    ],
    ids=["nul", "surrogate", "int-overflow"],
)
async def test_a_batch_the_database_cannot_take_fails_alone_in_its_group(
    store_factory: StoreFactory, poison, sqlite_keeps_it
):
    """Values the API never lets through, given to the store directly: only their own batch is refused."""
    store = await store_factory.open()
    await add_boards(store, "g0-a", "g1-a")
    bad = make_batch("g1-a", 0, tags=poison.get("tags", TAGS), telemetry=poison.get("telemetry", ()))
    batches = [make_batch("g0-a", s) for s in range(20)]
    results = await asyncio.gather(
        *[store.ingest(b) for b in [*batches[:10], bad, *batches[10:]]], return_exceptions=True
    )
    if sqlite_keeps_it and store_factory.backend == "sqlite":
        assert results[10].status is IngestStatus.STORED
    else:
        assert isinstance(results[10], BadBatch), results[10]
    assert [r.status for i, r in enumerate(results) if i != 10] == [IngestStatus.STORED] * 20
    counts = {c.board: c for c in await store.board_counts()}
    assert counts["g0-a"].readings_total == 200
    if isinstance(results[10], BadBatch):
        assert (counts["g1-a"].readings_total, counts["g1-a"].batches_total) == (0, 0)
        # Nothing half-written: the corrected batch goes in under the same key.
        assert (await store.ingest(make_batch("g1-a", 0))).status is IngestStatus.STORED


@pytest.mark.parametrize(
    ("change", "field"),
    [
        ({"rssi_dd": np.zeros(3, dtype=np.int32)}, "rssi_dd"),
        ({"t_collector": np.full(10, np.nan)}, "t_collector"),
        ({"epoch": ""}, "epoch"),
        ({"telemetry": ({"t_ms": 5},)}, "telemetry[0].tag"),
        ({"gap": {"first_seq": 4, "last_seq": 2, "readings": 1, "reason": "spool_full"}}, "gap"),
    ],
)
async def test_malformed_batches_name_the_field(store, change, field):
    """Shape errors are refused before the database with the field named, and nothing is stored."""
    await add_boards(store, "g0-a")
    b = make_batch("g0-a", 0)
    fields = {f: getattr(b, f) for f in IngestBatch.__slots__} | change
    with pytest.raises(BadBatch) as e:
        await store.ingest(IngestBatch(**fields))
    assert e.value.field == field
    assert await total_readings(store) == 0


async def test_open_store_picks_the_backend_from_the_url(store_factory: StoreFactory):
    """``open_store`` opens SQLite for sqlite:/// URLs and PostgreSQL for postgresql:// ones, migrated."""
    store = await open_store(store_factory.url, **store_factory.options())
    store_factory.opened.append(store)
    assert (
        type(store).__name__ == {"sqlite": "SqliteStore", "postgres": "PostgresStore"}[store_factory.backend]
    )
    await add_boards(store, "g0-a")
    assert (await store.ingest(make_batch("g0-a", 0))).status is IngestStatus.STORED


async def test_unknown_board_is_refused(store):
    """A batch for a board the store does not know is a ValueError naming it."""
    with pytest.raises(ValueError, match="g9-z"):
        await store.ingest(make_batch("g9-z", 0))


async def test_hundreds_of_concurrent_batches_are_stored_exactly_once(store_factory: StoreFactory):
    """300 batches from 20 boards at once, each sent twice: every one stored once (SQLite: group-committed)."""
    store = await store_factory.open()
    boards = [f"b{i:02d}" for i in range(20)]
    await add_boards(store, *boards)
    batches = [make_batch(b, seq, n=5) for b in boards for seq in range(15)]
    sends = batches + batches[::-1]
    random.Random(7).shuffle(sends)
    results = await asyncio.gather(*[store.ingest(b) for b in sends])
    statuses = [r.status for r in results]
    assert statuses.count(IngestStatus.STORED) == 300 and statuses.count(IngestStatus.DUPLICATE) == 300
    assert await total_readings(store) == 1500
    assert {c.board: c.readings_total for c in await store.board_counts()} == dict.fromkeys(boards, 75)
    assert await store.seq_holes() == []
    if store_factory.backend == "sqlite":
        assert store.ingest_batches == 600 and store.ingest_commits < 600
        # Committed means visible to any other connection on the file.
        with sqlite3.connect(store_factory.path) as con:
            assert con.execute("SELECT count(*) FROM batches").fetchone()[0] == 300
        await store.close()
        small = await store_factory.open(max_group_batches=50)
        await asyncio.gather(*[small.ingest(make_batch(b, 100 + s, n=2)) for b in boards for s in range(10)])
        assert 4 <= small.ingest_commits < 200  # 200 batches, at most 50 per group


# -- gaps, holes ------------------------------------------------------------------------------------------


async def test_gap_records_cover_seqs_and_the_rest_are_holes(store):
    """Seqs neither stored nor covered by a gap record are holes, per (board, epoch)."""
    await add_boards(store, "u2-a", "u4-b")
    for seq in (0, 1, 2, 7, 10):
        await store.ingest(make_batch("u2-a", seq))
    await store.ingest(gap_record("u2-a", 6, first=3, last=4, readings=420))
    await store.ingest(make_batch("u2-a", 3, epoch="ffff000011112222"))
    await store.ingest(make_batch("u2-a", 6, epoch="ffff000011112222"))
    await store.ingest(make_batch("u4-b", 0))
    await store.ingest(make_batch("u4-b", 2))
    ep = "a1b2c3d4e5f60718"
    assert await store.seq_holes("u2-a") == [
        SeqHole("u2-a", ep, 5, 5),
        SeqHole("u2-a", ep, 8, 9),
        SeqHole("u2-a", "ffff000011112222", 4, 5),
    ]
    assert await store.seq_holes() == [*await store.seq_holes("u2-a"), SeqHole("u4-b", ep, 1, 1)]
    counts = {c.board: c for c in await store.board_counts()}
    assert (counts["u2-a"].gap_readings, counts["u2-a"].readings_total, counts["u2-a"].batches_total) == (
        420,
        70,
        8,
    )
    # A late batch fills a hole.
    await store.ingest(make_batch("u2-a", 5))
    assert SeqHole("u2-a", ep, 5, 5) not in await store.seq_holes("u2-a")


async def test_one_boards_batches_stored_concurrently_in_and_out_of_order(store):
    """
    Batches of one board in flight at once, in order, out of order, duplicated and with a gap record:
    no lock conflict between them (PostgreSQL takes the board's row first, whichever path a batch
    takes), every seq accounted once and the board's counts exact.
    """
    await add_boards(store, "c0-a")
    seqs = [*range(30), 40, 35, 33, 12, 5]  # 30..39 partly missing: holes; 12 and 5 again: duplicates
    calls = [store.ingest(make_batch("c0-a", s)) for s in seqs]
    calls.insert(17, store.ingest(gap_record("c0-a", 41, first=36, last=39, readings=7)))
    results = await asyncio.gather(*calls)
    statuses = [r.status for r in results]
    assert statuses.count(IngestStatus.STORED) == 34 and statuses.count(IngestStatus.DUPLICATE) == 2
    assert await store.seq_holes("c0-a") == [
        SeqHole("c0-a", "a1b2c3d4e5f60718", 30, 32),
        SeqHole("c0-a", "a1b2c3d4e5f60718", 34, 34),
    ]
    counts = {c.board: c for c in await store.board_counts()}["c0-a"]
    assert (counts.readings_total, counts.batches_total, counts.gap_readings) == (330, 34, 7)


async def test_seq_holes_match_a_plain_model(store):
    """Random stored seqs and gap ranges: holes equal the set difference computed directly (seed printed)."""
    seed = random.randrange(2**32)
    print(f"seq hole model seed={seed}")
    rng = random.Random(seed)
    await add_boards(store, "g5-a")
    expected: list[SeqHole] = []
    for case in range(12):
        epoch = f"{case:016x}"
        covered: set[int] = set()
        seqs = sorted(rng.sample(range(60), rng.randint(1, 25)))
        for s in seqs:
            if rng.random() < 0.2:
                lo = rng.randint(0, 59)
                hi = min(59, lo + rng.randint(0, 6))
                await store.ingest(gap_record("g5-a", s, lo, hi, 10, epoch=epoch))
                covered |= set(range(lo, hi + 1))
            else:
                await store.ingest(make_batch("g5-a", s, n=1, epoch=epoch))
            covered.add(s)
        missing = [s for s in range(min(covered), max(covered) + 1) if s not in covered]
        runs: list[list[int]] = []
        for s in missing:
            if runs and runs[-1][1] == s - 1:
                runs[-1][1] = s
            else:
                runs.append([s, s])
        expected += [SeqHole("g5-a", epoch, a, b) for a, b in runs]
    assert await store.seq_holes("g5-a") == expected


def _spool(epoch: str, next_seq, **more) -> dict:
    """A heartbeat's stats as the agent sends them (agent/service.py ``stats``), spool part only."""
    return {"spool": {"epoch": epoch, "next_seq": next_seq, "batches": 0, **more}}


async def test_a_tail_left_behind_by_a_new_epoch_is_a_hole(store):
    """Seqs a heartbeat announced in an epoch the board has left, never sent, are a tail hole once a batch
    of the new epoch arrived; late batches shrink it; malformed or older heartbeats announce nothing."""
    old, new, unseen = "a1b2c3d4e5f60718", "0badc0ffee0ddf00", "5eed5eed5eed5eed"
    await add_boards(store, "u2-a", "g0-a")
    for seq in range(4):
        await store.ingest(make_batch("u2-a", seq, epoch=old))
    t = 1_800_000_000.0
    await store.add_heartbeat(Heartbeat("u2-a", t, "boot-1", _spool(old, 7)))  # sealed 0..6
    assert await store.seq_holes() == []  # still its epoch: 4..6 are on their way
    await store.add_heartbeat(Heartbeat("u2-a", t + 30, "boot-2", _spool(new, 1)))
    assert await store.seq_holes() == []  # no batch of the new epoch yet: the old one may still drain
    await store.ingest(make_batch("u2-a", 4, epoch=old))
    await store.ingest(make_batch("u2-a", 0, epoch=new))
    assert await store.seq_holes() == [SeqHole("u2-a", old, 5, 6, tail=True)]
    await store.ingest(make_batch("u2-a", 5, epoch=old))  # a late one after all
    assert await store.seq_holes("u2-a") == [SeqHole("u2-a", old, 6, 6, tail=True)]
    # Hostile or foreign figures change nothing; the heartbeat itself is still stored.
    for stats in (
        _spool("NOT-AN-EPOCH", 99),
        _spool(old, "99"),
        _spool(old, True),
        _spool(old, -1),
        _spool(old, 2**60),
        _spool(old, 99.0),
        {"spool": ["epoch", old]},
        {"spool_depth": 3},
    ):
        await store.add_heartbeat(Heartbeat("u2-a", t + 40, "boot-2", stats))
    # An older heartbeat arriving late does not take the board back to the old epoch.
    await store.add_heartbeat(Heartbeat("u2-a", t + 10, "boot-1", _spool(old, 9)))
    assert await store.seq_holes("u2-a") == [SeqHole("u2-a", old, 6, 8, tail=True)]
    assert len(await store.heartbeats("u2-a", since=t + 40)) == 8
    # An epoch no batch ever opened has no span to extend; another board is not touched.
    await store.ingest(make_batch("g0-a", 0, epoch=old))
    await store.add_heartbeat(Heartbeat("g0-a", t, "boot-1", _spool(unseen, 5)))
    await store.ingest(make_batch("g0-a", 0, epoch=unseen))
    assert await store.seq_holes("g0-a") == []
    # Every batch of the tail that arrives closes it (a dead-lettered one would be a gap record).
    gap = {"first_seq": 6, "last_seq": 8, "readings": 30, "reason": "dead_letter", "epoch": old}
    assert (await store.ingest(make_batch("u2-a", 1, n=0, epoch=new, gap=gap))).status is IngestStatus.STORED
    assert await store.seq_holes() == []


# -- clock samples, heartbeats, events, telemetry ------------------------------------------------------------


async def _last_boot(store, board: str) -> str | None:
    return {c.board: c for c in await store.board_counts()}[board].last_boot


async def test_clock_samples_and_latest_boot(store):
    """Samples are kept per (board, boot) in collector-time order; the latest boot follows contact time."""
    await add_boards(store, "u2-a")
    for i in range(5):
        await store.add_clock_sample(
            ClockSample("u2-a", "boot-1", 10.0 + i, 1_800_000_000.0 + i, 1_800_000_000.1 + i, 10.2 + i)
        )
    await store.add_clock_sample(ClockSample("u2-a", "boot-2", 1.0, 1_800_000_100.0, 1_800_000_100.1, 1.2))
    assert [s.t1 for s in await store.clock_samples("u2-a", "boot-1")] == [10.0, 11.0, 12.0, 13.0, 14.0]
    assert [s.t2 for s in await store.clock_samples("u2-a", "boot-1", since=1_800_000_003.0)] == [
        1_800_000_003.0,
        1_800_000_004.0,
    ]
    assert await _last_boot(store, "u2-a") == "boot-2"
    # An older contact (a backlog batch sealed in the earlier boot) does not move it back.
    await store.ingest(make_batch("u2-a", 0, boot="boot-1", received_at=1_800_000_050.0))
    assert await _last_boot(store, "u2-a") == "boot-2"
    await store.add_heartbeat(Heartbeat("u2-a", 1_800_000_200.0, "boot-3", {}))
    assert await _last_boot(store, "u2-a") == "boot-3"
    with pytest.raises(ValueError):
        await store.add_clock_sample(ClockSample("u2-a", "boot-1", float("nan"), 1.0, 1.0, 1.0))


@pytest.mark.parametrize("seed", range(4))
async def test_latest_boot_follows_every_contact_in_order_of_its_time(store_factory: StoreFactory, seed: int):
    """
    The board's latest boot after any mix of contacts, each sent alone or queued together, equals a plain
    model: every contact (its clock sample's t2 and boot first, then the contact's own time and boot) moves
    it only if no earlier-stored contact was later; a duplicate batch contributes only its sample.
    """
    store = await store_factory.open()
    rnd = random.Random(seed)
    await add_boards(store, "u4-a")
    model: tuple[float, str] | None = None
    stored: list[int] = []

    def note(at: float, boot: str) -> None:
        nonlocal model
        if model is None or model[0] <= at:
            model = (at, boot)

    for round_ in range(6):
        calls = []
        for _ in range(rnd.randrange(1, 6)):
            at = 1_800_000_000.0 + rnd.randrange(0, 40)  # ties on purpose
            boot = rnd.choice(["boot-1", "boot-2", "boot-3"])
            sample = None
            if rnd.random() < 0.6:
                t2 = at - rnd.randrange(0, 5) if rnd.random() < 0.8 else at + 3  # a sample stamped later, too
                sample = ClockSample("u4-a", rnd.choice(["boot-1", "boot-2", "boot-3"]), 5.0, t2, t2, 5.1)
                note(sample.t2, sample.boot)
            if rnd.random() < 0.5:
                seq = rnd.randrange(0, 12)
                b = dataclasses.replace(make_batch("u4-a", seq, boot=boot, received_at=at), clock=sample)
                if seq not in stored:
                    stored.append(seq)
                    note(at, boot)
                calls.append(store.ingest(b))
            else:
                note(at, boot)
                calls.append(store.add_heartbeat(Heartbeat("u4-a", at, boot, {}), clock=sample))
        if store_factory.backend == "sqlite":
            await asyncio.gather(*calls)  # one group commit, in the order queued
        else:
            for call in calls:  # a pool of connections: concurrent ones may commit in any order
                await call
        assert model is not None and await _last_boot(store, "u4-a") == model[1], f"round {round_}"


async def test_heartbeat_history_is_bounded(store_factory: StoreFactory):
    """Only the newest ``heartbeat_history`` heartbeats per board stay; the latest one is always at hand."""
    store = await store_factory.open(heartbeat_history=3)
    await add_boards(store, "g2-a", "g6-a")
    for i in range(6):
        await store.add_heartbeat(Heartbeat("g2-a", 100.0 + i, "boot-1", {"spool_depth": i, "adapter": "up"}))
    await store.add_heartbeat(Heartbeat("g6-a", 50.0, "boot-9", {"spool_depth": 0}))
    assert [h.stats["spool_depth"] for h in await store.heartbeats("g2-a", since=0.0)] == [3, 4, 5]
    assert [h.at for h in await store.heartbeats("g2-a", since=104.0)] == [104.0, 105.0]
    latest = await store.latest_heartbeats()
    assert latest["g2-a"] == Heartbeat("g2-a", 105.0, "boot-1", {"spool_depth": 5, "adapter": "up"})
    assert latest["g6-a"].boot == "boot-9"


async def test_heartbeats_among_concurrent_batches_fail_alone_and_the_rest_is_durable(
    store_factory: StoreFactory,
):
    """
    Heartbeats sent while batches are being stored: every one answered, a heartbeat of an unknown board
    fails alone (SQLite: in the same group transaction as the batches), and everything answered is
    there after a reopen.
    """
    store = await store_factory.open()
    boards = [f"h{i}" for i in range(4)]
    await add_boards(store, *boards)
    sample = ClockSample("h0", "boot-1", 10.0, 1_800_000_000.0, 1_800_000_000.1, 10.2)
    calls = [
        store.ingest(make_batch(b, seq, received_at=1_800_000_005.0)) for b in boards for seq in range(3)
    ]
    calls += [
        store.add_heartbeat(Heartbeat(b, 1_800_000_010.0, "boot-1", {"i": i})) for i, b in enumerate(boards)
    ]
    calls.insert(5, store.add_heartbeat(Heartbeat("h9-unknown", 1_800_000_010.0, "boot-1", {})))
    calls.insert(7, store.add_heartbeat(Heartbeat("h0", 1_800_000_011.0, "boot-2", {}), clock=sample))
    same_boot = ClockSample("h1", "boot-1", 20.0, 1_800_000_001.0, 1_800_000_001.1, 20.2)
    calls.insert(9, store.add_heartbeat(Heartbeat("h1", 1_800_000_009.0, "boot-1", {}), clock=same_boot))
    results = await asyncio.gather(*calls, return_exceptions=True)
    assert isinstance(results[5], ValueError) and "h9-unknown" in str(results[5])
    assert [r for i, r in enumerate(results) if i != 5 and isinstance(r, BaseException)] == []
    if store_factory.backend == "sqlite":
        assert store.ingest_commits == 1  # the batches and the heartbeats queued with them: one commit
    await store.close()
    store = await store_factory.open()
    assert await total_readings(store) == 120
    assert {b: h.stats for b, h in (await store.latest_heartbeats()).items()} == {
        "h0": {},
        "h1": {"i": 1},
        "h2": {"i": 2},
        "h3": {"i": 3},
    }
    assert [s.t1 for s in await store.clock_samples("h0", "boot-1")] == [10.0]
    assert await store.clock_samples("h1", "boot-1") == [same_boot]
    assert await _last_boot(store, "h0") == "boot-2"


async def test_events_are_a_cursor(store):
    """Event ids increase; ``since_id``, ``limit`` and ``board`` page and filter."""
    await add_boards(store, "g0-a", "u3-a")
    ids = [
        await store.add_event(Event(1.0 + i, b, "state_changed", {"to": s}))
        for i, (b, s) in enumerate([("g0-a", "live"), ("u3-a", "late"), (None, "x"), ("u3-a", "silent")])
    ]
    assert ids == sorted(ids) and len(set(ids)) == 4
    evs = await store.events()
    assert [(e.board, e.detail["to"], e.id) for e in evs] == [
        ("g0-a", "live", ids[0]),
        ("u3-a", "late", ids[1]),
        (None, "x", ids[2]),
        ("u3-a", "silent", ids[3]),
    ]
    assert [e.id for e in await store.events(since_id=ids[1])] == ids[2:]
    assert [e.id for e in await store.events(limit=2)] == ids[:2]
    assert [e.detail["to"] for e in await store.events(board="u3-a")] == ["late", "silent"]
    with pytest.raises(ValueError, match="g9-z"):
        await store.add_event(Event(9.0, "g9-z", "loss"))


async def test_latest_telemetry_per_tag(store):
    """The newest telemetry row per tag, with the board that heard it."""
    await add_boards(store, "g0-a", "g3-a")
    await store.ingest(
        make_batch(
            "g0-a",
            0,
            received_at=100.0,
            telemetry=({"tag": TAGS[1], "t_ms": 5, "battery_mv": 2980, "temperature_c": 21.5},),
        )
    )
    await store.ingest(
        make_batch(
            "g3-a",
            0,
            received_at=200.0,
            telemetry=(
                {"tag": TAGS[1], "t_ms": 9, "battery_mv": 2970},
                {"tag": "eddystone:8b0ca750e7a74e14bd99:000000000002", "t_ms": 9, "uptime_s": 3600},
            ),
        )
    )
    tel = await store.latest_telemetry()
    assert (tel[TAGS[1]].board, tel[TAGS[1]].battery_mv, tel[TAGS[1]].temperature_c, tel[TAGS[1]].at) == (
        "g3-a",
        2970,
        None,
        200.0,
    )
    assert list(await store.latest_telemetry([TAGS[1]])) == [TAGS[1]]


# -- export and retention -----------------------------------------------------------------------------------


async def test_readings_export_ranges_and_filters(store_factory: StoreFactory):
    """Half-open time ranges, board and tag filters, calibrated RSSI and offsets as numpy columns."""
    store = await store_factory.open()
    await add_boards(store, "g0-a", "g3-b")
    sent = [make_batch("g0-a", s, offset_db=2.5) for s in range(4)] + [
        make_batch("g3-b", s, offset_db=-1.2) for s in range(4)
    ]
    for b in sent:
        await store.ingest(b)
    await store.close()
    store = await store_factory.open()

    board = np.concatenate([np.full(b.n, b.board, dtype=object) for b in sent])
    tag = np.concatenate([b.tags for b in sent])
    t = np.concatenate([b.t_collector for b in sent])
    rssi = np.concatenate([b.rssi_dd for b in sent])
    off = np.concatenate([np.full(b.n, round(b.offset_db * 10)) for b in sent])
    t0 = 1_800_000_000.0
    for lo, hi, boards, tags in [
        (t0 + 5, t0 + 25, None, None),
        (-np.inf, np.inf, ["g3-b"], None),
        (t0, t0 + 40, None, TAGS[1:3]),
        (t0 + 10, t0 + 30, ["g0-a"], [TAGS[0]]),
        (t0, t0 + 40, ["nobody"], None),
        (t0 + 50, t0 + 60, None, None),
    ]:
        keep = (t >= lo) & (t < hi)
        if boards is not None:
            keep &= np.isin(board, boards)
        if tags is not None:
            keep &= np.isin(tag, tags)
        order = np.lexsort((tag[keep], board[keep], t[keep]))
        got = await store.readings(lo, hi, boards, tags)
        assert got.t_collector.dtype == np.float64 and got.rssi_dd.dtype == np.int32
        np.testing.assert_array_equal(got.t_collector, t[keep][order])
        # Rows with equal times are ordered by board id then tag id; compare as sorted sets of rows.
        want = sorted(zip(t[keep], board[keep], tag[keep], rssi[keep], off[keep], strict=True))
        have = sorted(zip(got.t_collector, got.board, got.tag, got.rssi_dd, got.offset_dd, strict=True))
        assert have == want


async def test_retention_deletes_in_chunks_and_keeps_dedup_keys(store):
    """Old readings go in bounded chunks; newer ones stay; deleted batches are still duplicates."""
    await add_boards(store, "g4-a")
    batches = [make_batch("g4-a", s, n=9) for s in range(6)]
    for b in batches:
        await store.ingest(b)
        await store.add_clock_sample(ClockSample("g4-a", "boot-1", 1.0, b.received_at, b.received_at, 1.0))
    cut = 1_800_000_000.0 + 25
    with pytest.raises(ValueError, match="chunk"):
        await store.delete_readings_before(cut, chunk=0)
    assert await store.delete_readings_before(cut, chunk=4) == 25
    left = await store.readings(-np.inf, np.inf)
    assert len(left.t_collector) == 54 - 25 and left.t_collector.min() >= cut
    assert await store.delete_readings_before(cut, chunk=4) == 0
    # Clock samples and batch keys have their own cut (delete_history_before).
    assert len(await store.clock_samples("g4-a", "boot-1")) == 6
    assert (await store.ingest(batches[0])).status is IngestStatus.DUPLICATE


# -- exclusion -----------------------------------------------------------------------------------------------


async def test_exclusive_lets_one_holder_at_a_time(store_factory: StoreFactory):
    """One holder per lock name; released at the end of the block (PostgreSQL: two collectors, two pools)."""
    a = await store_factory.open()
    b = await store_factory.open() if store_factory.backend == "postgres" else a
    async with a.exclusive("liveness") as got_a:
        assert got_a is True
        async with b.exclusive("liveness") as got_b:
            assert got_b is False
        async with b.exclusive("retention") as other:
            assert other is True
    async with b.exclusive("liveness") as got_b:
        assert got_b is True
        async with a.exclusive("liveness") as got_a:
            assert got_a is False
    async with a.exclusive("liveness") as again:
        assert again is True


async def test_advisory_lock_shows_in_pg_locks(pg_factory: StoreFactory):
    """While held, the lock is a session advisory lock on the key's two halves (PostgreSQL docs, pg_locks)."""
    import asyncpg

    from listenpost.collector.store.postgres import lock_key

    store = await pg_factory.open()
    key = lock_key("retention", store.lock_scope) & 0xFFFF_FFFF_FFFF_FFFF
    # PostgreSQL docs, "pg_locks": a bigint advisory key shows its high half in classid, its low half
    # in objid, and objsubid = 1.
    q = (
        "SELECT count(*) FROM pg_locks WHERE locktype = 'advisory' AND classid::bigint = $1 "
        "AND objid::bigint = $2 AND objsubid = 1 AND granted"
    )
    con = await asyncpg.connect(PG_URL, timeout=5)
    try:
        async with store.exclusive("retention") as got:
            assert got
            assert await con.fetchval(q, key >> 32, key & 0xFFFF_FFFF) == 1
        assert await con.fetchval(q, key >> 32, key & 0xFFFF_FFFF) == 0
    finally:
        await con.close()


# -- migrations ----------------------------------------------------------------------------------------------


async def _raw_migrate(
    factory: StoreFactory, upto: int | None = None, migrations=None, sql: str | None = None
):
    """Run migrations (and optionally one SQL statement) on the test database without a store."""
    if factory.backend == "sqlite":

        def job() -> int:
            con = sqlite3.connect(factory.path, isolation_level=None)
            try:
                v = mig.migrate_sqlite(con, migrations or mig.SQLITE, upto=upto)
                if sql:
                    con.execute(sql)
                return v
            finally:
                con.close()

        return await asyncio.to_thread(job)
    import asyncpg

    con = await asyncpg.connect(PG_URL, timeout=5)
    try:
        await con.execute(f'CREATE SCHEMA IF NOT EXISTS "{factory.schema}"')
        await con.execute(f'SET search_path TO "{factory.schema}"')
        v = await mig.migrate_postgres(con, migrations or mig.POSTGRES, upto=upto)
        if sql:
            await con.execute(sql)
        return v
    finally:
        await con.close()


def _versions(factory: StoreFactory) -> tuple[mig.Migration, ...]:
    return mig.SQLITE if factory.backend == "sqlite" else mig.POSTGRES


async def test_migrations_from_empty_and_from_an_older_version(store_factory: StoreFactory):
    """An older database is upgraded in place with its data; an empty one gets every version."""
    assert await _raw_migrate(store_factory, upto=1) == 1
    await _raw_migrate(
        store_factory, upto=1, sql="INSERT INTO boards (name, room, created_at) VALUES ('u0-a', 'U0', 5)"
    )
    store = await store_factory.open()
    assert (await store.get_board("u0-a")).room == "U0"
    await add_boards(store, "g0-a")
    assert (await store.ingest(make_batch("g0-a", 0))).status is IngestStatus.STORED  # v2 tables exist
    await store.close()
    assert await _raw_migrate(store_factory) == mig.latest(_versions(store_factory)) == 8


async def test_newer_schema_is_refused(store_factory: StoreFactory):
    """A database from a newer listenpost is refused with a message that says so, and left untouched."""
    await _raw_migrate(
        store_factory, sql="INSERT INTO schema_version (version, name, applied_at) VALUES (9, 'future', 'x')"
    )
    with pytest.raises(SchemaTooNew, match="version 9 is newer than this listenpost supports \\(8\\)"):
        await store_factory.open()


async def test_a_failing_migration_leaves_the_previous_version(store_factory: StoreFactory):
    """Each migration is one transaction: a failing step leaves no half-made tables behind."""
    base = _versions(store_factory)
    broken = (
        *base,
        mig.Migration(
            len(base) + 1, "broken", ("CREATE TABLE half_made (x integer)", "CREATE TABLE boards (x integer)")
        ),
    )
    with pytest.raises(Exception, match="boards"):
        await _raw_migrate(store_factory, migrations=broken)
    with pytest.raises(Exception, match="half_made"):
        await _raw_migrate(store_factory, sql="SELECT * FROM half_made")
    store = await store_factory.open()  # still the latest version: the current code opens it
    assert await store.list_boards() == []


# -- PostgreSQL: readings in day partitions ------------------------------------------------------------------

DAY = 86400.0
MIDNIGHT = 1_799_971_200.0
"""2027-01-15 00:00 UTC (1_800_000_000 is 08:00 that day)."""


@contextlib.asynccontextmanager
async def _admin(factory: StoreFactory):
    """A plain connection on the test schema, beside the store."""
    import asyncpg

    con = await asyncpg.connect(PG_URL, timeout=5)
    try:
        await con.execute(f'SET search_path TO "{factory.schema}"')
        yield con
    finally:
        await con.close()


async def _days(factory: StoreFactory) -> list[str]:
    """The partitions of readings now, by name."""
    async with _admin(factory) as con:
        rows = await con.fetch(
            "SELECT c.relname FROM pg_inherits i JOIN pg_class c ON c.oid = i.inhrelid "
            "WHERE i.inhparent = 'readings'::regclass"
        )
    return sorted(r[0] for r in rows)


def timed_batch(board: str, seq: int, times, **kw) -> IngestBatch:
    """`make_batch`'s batch with one reading at each of these collector times."""
    times = np.asarray(times, dtype=np.float64)
    kw.setdefault("received_at", float(times.max()))
    return dataclasses.replace(make_batch(board, seq, n=len(times), **kw), t_collector=times)


async def test_migration_7_moves_every_reading_of_a_v5_database_into_its_day(pg_factory: StoreFactory):
    """Readings of a v5 database over five days, midnight edges included, each land in their UTC day's
    partition with every value kept; the CHECK constraints and the BRIN index hold on every day."""
    from listenpost.collector.store.postgres import partition_name, reading_day

    assert await _raw_migrate(pg_factory, upto=5) == 5
    rng = np.random.default_rng(6)
    edges = MIDNIGHT + DAY * np.arange(-1, 3)
    t = np.concatenate(
        [rng.uniform(MIDNIGHT - DAY, MIDNIGHT + 2.5 * DAY, 3000), edges, np.nextafter(edges, -np.inf)]
    )
    rows = [
        (float(x), 1000 * i, 1 + i % 3, 1 + i % 4, 1, int(rng.integers(-2000, 501))) for i, x in enumerate(t)
    ]
    cols = ["t_collector", "t_board_ms", "batch_id", "tag_id", "board_id", "rssi_dd"]
    async with _admin(pg_factory) as con:
        await con.execute("INSERT INTO boards (name, room, created_at) VALUES ('g0-a', 'G0 Foyer', 0)")
        await con.executemany("INSERT INTO tags (tag) VALUES ($1)", [(x,) for x in TAGS])
        await con.executemany(
            "INSERT INTO batches (board_id, epoch, seq, digest, boot, n, received_at, offset_dd) "
            "VALUES (1, 'a1b2c3d4e5f60718', $1, 'd', 'boot-1', 0, 0, 25)",
            [(s,) for s in range(3)],
        )
        await con.copy_records_to_table("readings", records=rows, columns=cols)
        before = sorted(tuple(r) for r in await con.fetch(f"SELECT {', '.join(cols)} FROM readings"))
    assert len(before) == len(t)

    store = await pg_factory.open()
    async with _admin(pg_factory) as con:
        assert await con.fetchval("SELECT max(version) FROM schema_version") == mig.latest(mig.POSTGRES)
        after = await con.fetch(f"SELECT tableoid::regclass::text, {', '.join(cols)} FROM readings")
        brin = {
            r[0]
            for r in await con.fetch(
                "SELECT tablename FROM pg_indexes WHERE schemaname = current_schema() "
                "AND indexdef LIKE '%USING brin (t_collector)%'"
            )
        }
        assert await con.fetchval("SELECT to_regclass('readings_unpartitioned')") is None
    assert sorted(tuple(r)[1:] for r in after) == before
    days = {f"readings_202701{d}" for d in (13, 14, 15, 16, 17)}
    assert {r[0] for r in after} == days
    placed = {r[1]: r[0] for r in after}
    assert placed[MIDNIGHT] == "readings_20270115"
    assert placed[float(np.nextafter(MIDNIGHT, -np.inf))] == "readings_20270114"
    assert all(r[0] == partition_name(reading_day(r[1])) for r in after)  # the SQL and Python names agree
    assert brin == days | {"readings"}
    assert len((await store.readings(-np.inf, np.inf)).t_collector) == len(t)
    with pytest.raises(BadBatch) as e:
        await store.ingest(make_batch("g0-a", 9, t0=MIDNIGHT, rssi=np.full(10, 600, dtype=np.int32)))
    assert e.value.field == "rssi_dd"


async def test_ingest_makes_missing_days_and_midnight_readings_land_in_the_new_day(pg_factory: StoreFactory):
    """A batch on days without a partition makes them; a reading at midnight belongs to the day it starts."""
    store = await pg_factory.open()
    await add_boards(store, "g0-a")
    assert await _days(pg_factory) == []
    times = [
        MIDNIGHT - 1.0,
        float(np.nextafter(MIDNIGHT, -np.inf)),
        MIDNIGHT,
        MIDNIGHT + 0.001,
        MIDNIGHT + DAY - 0.5,
    ]
    assert (await store.ingest(timed_batch("g0-a", 0, times))).status is IngestStatus.STORED
    assert await _days(pg_factory) == ["readings_20270114", "readings_20270115"]
    async with _admin(pg_factory) as con:
        placed = {
            r[1]: r[0] for r in await con.fetch("SELECT tableoid::regclass::text, t_collector FROM readings")
        }
    assert placed == dict(zip(times, ["readings_20270114"] * 2 + ["readings_20270115"] * 3, strict=True))
    # Ahead of need: every day the range touches, each once, whichever collector asks.
    assert await store.ensure_reading_days(MIDNIGHT + 0.5 * DAY, MIDNIGHT + 1.5 * DAY) == 1
    other = await pg_factory.open()
    assert await other.ensure_reading_days(MIDNIGHT - DAY, MIDNIGHT + DAY) == 0
    assert await _days(pg_factory) == ["readings_20270114", "readings_20270115", "readings_20270116"]
    # A time no calendar day holds is refused by field name, and nothing of the batch is stored.
    with pytest.raises(BadBatch) as e:
        await store.ingest(timed_batch("g0-a", 1, [MIDNIGHT, 1e15]))
    assert e.value.field == "t_collector"
    assert len((await store.readings(-np.inf, np.inf)).t_collector) == len(times)


async def test_retention_drops_whole_days_and_deletes_the_straddling_day_in_chunks(pg_factory: StoreFactory):
    """Days wholly before the cut are dropped (at most max_chunks per call), the day holding the cut loses
    its older rows in chunks, and the calls together return exactly the readings that went."""
    store = await pg_factory.open()
    await add_boards(store, "g0-a")
    # Four days from 2027-01-14: 20 readings and one telemetry row every 3 hours.
    telemetry = ({"tag": TAGS[1], "t_ms": 5, "battery_mv": 2980},)
    times = [MIDNIGHT - DAY + s * 10800 + np.arange(20.0) for s in range(32)]
    for s, ts in enumerate(times):
        await store.ingest(timed_batch("g0-a", s, ts, telemetry=telemetry))
    t = np.concatenate(times)
    cut = MIDNIGHT + DAY + 6 * 3600 + 5.5  # 2027-01-16 06:00:05.5: six readings of that batch are older
    first = await store.delete_readings_before(cut, chunk=4, max_chunks=1)
    assert first == 160 + 4  # the first day whole, one chunk of the day holding the cut
    assert await _days(pg_factory) == ["readings_20270115", "readings_20270116", "readings_20270117"]
    total, calls = first, 1
    while n := await store.delete_readings_before(cut, chunk=4, max_chunks=1):
        total, calls = total + n, calls + 1
    assert total == int((t < cut).sum()) == 160 + 160 + 46
    assert calls == 12  # 46 rows of the straddling day in chunks of 4, one chunk per call
    assert await _days(pg_factory) == ["readings_20270116", "readings_20270117"]
    left = await store.readings(-np.inf, np.inf)
    assert len(left.t_collector) == len(t) - total and left.t_collector.min() >= cut
    async with _admin(pg_factory) as con:
        assert await con.fetchval("SELECT count(*) FROM telemetry WHERE at < $1", cut) == 0
        assert await con.fetchval("SELECT count(*) FROM telemetry") == sum(ts.max() >= cut for ts in times)
    # Without a budget, in one call: the rest of the readings before a later cut.
    later = MIDNIGHT + 2 * DAY + 1.0
    assert await store.delete_readings_before(later, chunk=1000) == int(((t >= cut) & (t < later)).sum())
    assert await _days(pg_factory) == ["readings_20270117"]


async def test_a_day_detached_but_not_dropped_is_dropped_and_counted_on_the_next_pass(
    pg_factory: StoreFactory,
):
    """A drop cut short after its detach (the process stopped) is finished by the next call, and counted."""
    store = await pg_factory.open()
    await add_boards(store, "g0-a")
    for s in range(2):
        await store.ingest(timed_batch("g0-a", s, MIDNIGHT - DAY + 60 * s + np.arange(20.0)))
    await store.ingest(timed_batch("g0-a", 2, MIDNIGHT + np.arange(5.0)))
    async with _admin(pg_factory) as con:
        await con.execute("ALTER TABLE readings DETACH PARTITION readings_20270114")
        await con.execute("ALTER TABLE readings_20270114 RENAME TO readings_20270114_dropped")
    assert await store.delete_readings_before(MIDNIGHT - DAY) == 40
    async with _admin(pg_factory) as con:
        assert await con.fetchval("SELECT to_regclass('readings_20270114_dropped')") is None
    assert len((await store.readings(-np.inf, np.inf)).t_collector) == 5


async def test_two_collectors_making_the_same_days_at_once_both_succeed(pg_factory: StoreFactory):
    """Two stores making days ahead, or ingesting into a day nobody made yet, at the same moment: no
    failure, each day made once."""
    a, b = await pg_factory.open(), await pg_factory.open()
    await add_boards(a, "g0-a", "g0-b")
    made = await asyncio.gather(
        a.ensure_reading_days(MIDNIGHT, MIDNIGHT + 9 * DAY),
        b.ensure_reading_days(MIDNIGHT, MIDNIGHT + 9 * DAY),
    )
    assert sorted(made) == [0, 10]
    for k in range(5):
        day = MIDNIGHT + (10 + k) * DAY
        got = await asyncio.gather(
            a.ingest(timed_batch("g0-a", k, [day + 1.0, day + 2.0])),
            b.ingest(timed_batch("g0-b", k, [day + 3.0])),
        )
        assert [r.status for r in got] == [IngestStatus.STORED] * 2
    assert len(await _days(pg_factory)) == 15
    assert len((await a.readings(-np.inf, np.inf)).t_collector) == 15


async def test_a_day_another_collector_dropped_is_made_again_at_ingest(pg_factory: StoreFactory):
    """A store that still counts on a day another collector's retention dropped stores a late batch anyway."""
    a, b = await pg_factory.open(), await pg_factory.open()
    await add_boards(a, "g0-a")
    await a.ingest(timed_batch("g0-a", 0, MIDNIGHT + np.arange(10.0)))
    assert await b.delete_readings_before(MIDNIGHT + DAY) == 10
    assert await _days(pg_factory) == []
    assert (
        await a.ingest(timed_batch("g0-a", 1, MIDNIGHT + 100 + np.arange(3.0)))
    ).status is IngestStatus.STORED
    assert await _days(pg_factory) == ["readings_20270115"]
    assert len((await a.readings(-np.inf, np.inf)).t_collector) == 3


async def test_day_ddl_behind_a_long_reader_gives_way_and_goes_through_afterwards(pg_factory: StoreFactory):
    """While a transaction reads readings (an export, say), making or detaching a day cannot get its lock:
    the pass makes and drops nothing, raises nothing and counts nothing; the next pass does it all."""
    store = await pg_factory.open(lock_timeout_s=0.2)
    await add_boards(store, "g0-a")
    await store.ingest(timed_batch("g0-a", 0, MIDNIGHT - DAY + np.arange(30.0)))
    await store.ingest(timed_batch("g0-a", 1, MIDNIGHT + np.arange(5.0)))
    async with _admin(pg_factory) as con, con.transaction():
        assert await con.fetchval("SELECT count(*) FROM readings") == 35  # holds its lock on readings
        assert await store.ensure_reading_days(MIDNIGHT + DAY, MIDNIGHT + DAY) == 0
        assert await store.delete_readings_before(MIDNIGHT) == 0
    assert await _days(pg_factory) == ["readings_20270114", "readings_20270115"]
    assert await store.ensure_reading_days(MIDNIGHT + DAY, MIDNIGHT + DAY) == 1
    assert await store.delete_readings_before(MIDNIGHT) == 30
    assert await _days(pg_factory) == ["readings_20270115", "readings_20270116"]


def _relations(plan) -> set[str]:
    """Every table an EXPLAIN (FORMAT JSON) plan reads."""
    if isinstance(plan, list):
        return set().union(*map(_relations, plan)) if plan else set()
    if isinstance(plan, dict):
        own = {plan["Relation Name"]} if "Relation Name" in plan else set()
        return own.union(*(_relations(v) for v in plan.values()))
    return set()


async def test_export_across_days_matches_sqlite_and_reads_only_the_window_days(
    pg_factory: StoreFactory, sqlite_factory: StoreFactory
):
    """A window over three days returns from the partitioned table exactly what SQLite's one table returns,
    both through `readings` and through the export's scan; the plan reads only the window's days."""
    import json

    pg, lite = await pg_factory.open(), await sqlite_factory.open()
    rng = np.random.default_rng(7)
    for store in (pg, lite):
        await add_boards(store, "g0-a", "g1-a")
    for s in range(40):  # five days from 2027-01-13, two boards, distinct times
        ts = np.sort(rng.uniform(MIDNIGHT - 2 * DAY, MIDNIGHT + 3 * DAY, 25))
        rssi = rng.integers(-1000, -300, 25).astype(np.int32)
        for store in (pg, lite):
            assert (
                await store.ingest(timed_batch(f"g{s % 2}-a", s, ts, rssi=rssi))
            ).status is IngestStatus.STORED
    lo, hi = MIDNIGHT - 3600.5, MIDNIGHT + DAY + 7200.0
    want, got = await lite.readings(lo, hi), await pg.readings(lo, hi)
    assert len(got.t_collector) > 0
    for col in ("board", "tag", "t_collector", "rssi_dd", "offset_dd"):
        np.testing.assert_array_equal(getattr(got, col), getattr(want, col))

    async def scan(store) -> list[tuple]:
        rows: list[tuple] = []

        def sink(c) -> None:
            rows.extend(
                (c.board_names[int(b)], c.tag_names[int(g)], float(x), int(r), int(o))
                for b, g, x, r, o in zip(
                    c.board_id, c.tag_id, c.t_collector, c.rssi_dd, c.offset_dd, strict=True
                )
            )

        await store.scan_readings(lo, hi, sink, chunk_rows=7)
        return sorted(rows)

    assert await scan(pg) == await scan(lite) != []
    async with pg._acquire() as con:
        plan = await con.fetchval(
            "EXPLAIN (FORMAT JSON) SELECT board_id::int4, tag_id::int4, t_collector, rssi_dd::int4, batch_id::int8 "
            "FROM readings WHERE t_collector >= $1 AND t_collector < $2",
            lo,
            hi,
        )
    assert len(await _days(pg_factory)) == 5
    assert _relations(json.loads(plan)) == {"readings_20270114", "readings_20270115", "readings_20270116"}


# -- durability settings and unavailability --------------------------------------------------------------------


async def test_sqlite_writer_is_wal_and_synchronous_full(sqlite_factory: StoreFactory):
    """The writer commits with journal_mode=wal and synchronous=FULL (sqlite.org/pragma.html: FULL is 2)."""
    store = await sqlite_factory.open()
    mode, sync = await store._write(
        lambda: (
            store._wcon.execute("PRAGMA journal_mode").fetchone()[0],
            store._wcon.execute("PRAGMA synchronous").fetchone()[0],
        )
    )
    assert (mode, sync) == ("wal", 2)
    # A second plain connection sees WAL mode persisted in the file header.
    with sqlite3.connect(sqlite_factory.path) as con:
        assert con.execute("PRAGMA journal_mode").fetchone()[0] == "wal"


async def test_sqlite_locked_past_the_busy_timeout_is_unavailable_then_recovers(sqlite_factory: StoreFactory):
    """Another process holding the write lock → StoreUnavailable after the bounded wait; fine once released."""
    store = await sqlite_factory.open(busy_timeout_s=0.2)
    await add_boards(store, "g0-a")
    other = sqlite3.connect(sqlite_factory.path, isolation_level=None, check_same_thread=False)
    try:
        other.execute("BEGIN IMMEDIATE")
        with pytest.raises(StoreUnavailable, match="locked"):
            await store.ingest(make_batch("g0-a", 0))
        with pytest.raises(StoreUnavailable):
            await store.add_tags(["lpx:00000001"], 1.0)
        other.execute("ROLLBACK")
    finally:
        other.close()
    assert (await store.ingest(make_batch("g0-a", 0))).status is IngestStatus.STORED


async def test_postgres_keeps_synchronous_commit_on_even_if_the_url_turns_it_off(pg_factory: StoreFactory):
    """A connection default of synchronous_commit=off (here from the URL) is overridden on every pooled connection."""
    from listenpost.collector.store.postgres import PostgresStore

    url = PG_URL + ("&" if "?" in PG_URL else "?") + "synchronous_commit=off"
    import asyncpg

    con = await asyncpg.connect(url, timeout=5)
    try:
        assert await con.fetchval("SHOW synchronous_commit") == "off"  # the URL alone does turn it off
    finally:
        await con.close()
    store = await PostgresStore.open(url, schema=pg_factory.schema, min_size=2, max_size=2)
    pg_factory.opened.append(store)
    for _ in range(3):
        assert await store._pool.fetchval("SHOW synchronous_commit") == "on"


async def test_postgres_connection_loss_is_unavailable_then_the_pool_recovers(pg_factory: StoreFactory):
    """A backend killed mid-statement → StoreUnavailable; the next call reconnects and works."""
    import asyncpg

    store = await pg_factory.open(min_size=2, max_size=2, lock_timeout_s=10.0)
    await add_boards(store, "u1-a")
    admin = await asyncpg.connect(PG_URL, timeout=5)
    try:
        await admin.execute(f'SET search_path TO "{pg_factory.schema}"')
        tx = admin.transaction()
        await tx.start()
        await admin.execute("LOCK TABLE readings IN ACCESS EXCLUSIVE MODE")
        pending = asyncio.create_task(store.ingest(make_batch("u1-a", 0)))
        # Only this store's backend, waiting on this schema's table: other tests share the server.
        waiting = (
            "SELECT array_agg(pid) FROM pg_locks WHERE NOT granted AND relation = 'readings'::regclass "
            "AND pid <> pg_backend_pid()"
        )
        for _ in range(200):  # bounded: the ingest reaches its lock wait within a few loopback round trips
            if await admin.fetchval(waiting):
                break
            await asyncio.sleep(0.01)
        (pid,) = await admin.fetchval(waiting)
        assert await admin.fetchval("SELECT pg_terminate_backend($1)", pid)
        with pytest.raises(StoreUnavailable):
            await asyncio.wait_for(pending, 10)
        await tx.rollback()
    finally:
        await admin.close()
    # Recovery: the stale connections were expired, the pool reconnects.
    assert (await store.ingest(make_batch("u1-a", 0))).status is IngestStatus.STORED
    assert [b.name for b in await store.list_boards()] == ["u1-a"]


async def test_postgres_lock_held_past_lock_timeout_is_unavailable(pg_factory: StoreFactory):
    """A lock held elsewhere past lock_timeout_s → StoreUnavailable, not a hang."""
    import asyncpg

    store = await pg_factory.open(lock_timeout_s=0.2)
    await add_boards(store, "u1-a")
    admin = await asyncpg.connect(PG_URL, timeout=5)
    try:
        await admin.execute(f'SET search_path TO "{pg_factory.schema}"')
        async with admin.transaction():
            await admin.execute("LOCK TABLE readings IN ACCESS EXCLUSIVE MODE")
            with pytest.raises(StoreUnavailable, match="LockNotAvailable"):
                await store.ingest(make_batch("u1-a", 0))
    finally:
        await admin.close()
    assert (await store.ingest(make_batch("u1-a", 0))).status is IngestStatus.STORED


async def test_unreachable_postgres_is_unavailable():
    """Nothing listening on the port → StoreUnavailable at open, quickly."""
    await require_pg()  # same skip rule as the rest; the port below is closed either way
    with pytest.raises(StoreUnavailable, match="unreachable"):
        await open_store("postgresql://postgres@127.0.0.1:1/test", connect_timeout_s=2)


# -- PostgreSQL binary COPY export --------------------------------------------------------------------------


def test_copy_binary_parser_reads_the_documented_layout():
    """A stream built by hand from the PostgreSQL docs ("COPY", Binary Format) parses to the values put in."""
    import struct

    from listenpost.collector.store.postgres import parse_copy_binary

    header = b"PGCOPY\n\xff\r\n\x00" + struct.pack(">ii", 0, 4) + b"abcd"  # 4-byte header extension, skipped

    def row(b, t, tc, r, o):
        return struct.pack(">h" + "i" * 4 + "id" + "ii" * 2, 5, 4, b, 4, t, 8, tc, 4, r, 4, o)

    stream = (
        header + row(1, 7, 1_800_000_000.25, -705, 25) + row(2, 9, 1_800_000_001.5, -1000, -12) + b"\xff\xff"
    )
    arr = parse_copy_binary(stream)
    assert arr["board_id"].tolist() == [1, 2] and arr["tag_id"].tolist() == [7, 9]
    assert arr["t_collector"].tolist() == [1_800_000_000.25, 1_800_000_001.5]
    assert arr["rssi_dd"].tolist() == [-705, -1000] and arr["offset_dd"].tolist() == [25, -12]
    with pytest.raises(ValueError, match="signature"):
        parse_copy_binary(b"PGCOPY\n\xff\r\n\x01" + stream[11:])
    with pytest.raises(ValueError, match="fields"):
        parse_copy_binary(
            stream.replace(
                struct.pack(">h", 5) + struct.pack(">i", 4), struct.pack(">h", 4) + struct.pack(">i", 4), 1
            )
        )


async def test_binary_export_agrees_with_asyncpg_row_decoding(pg_factory: StoreFactory):
    """The COPY-binary export gives the same rows asyncpg's own decoder returns for the same query."""
    store = await pg_factory.open()
    await add_boards(store, "g0-a", "g0-b")
    for s in range(3):
        await store.ingest(make_batch("g0-a", s, n=50, offset_db=1.7))
        await store.ingest(make_batch("g0-b", s, n=50, offset_db=-3.0))
    got = await store.readings(-np.inf, np.inf)
    rows = await store._pool.fetch(
        "SELECT bo.name, tg.tag, r.t_collector, r.rssi_dd, b.offset_dd FROM readings r JOIN batches b ON b.id = r.batch_id "
        "JOIN boards bo ON bo.id = r.board_id JOIN tags tg ON tg.id = r.tag_id"
    )
    assert sorted(map(tuple, rows)) == sorted(
        zip(got.board, got.tag, got.t_collector, got.rssi_dd, got.offset_dd, strict=True)
    )
    assert len(rows) == 300


async def test_one_group_with_duplicates_conflicts_a_refusal_and_new_tags_is_what_a_reopen_shows(
    store_factory: StoreFactory,
):
    """
    One group (SQLite) holding the same key three times, a refused batch that brings the same new tag as
    a batch after it, a heartbeat of an unknown board, a gap record and the late batch that fills its
    hole: each caller's answer is what a reopened store holds, and the tag's id is not one of the
    rolled-back attempt.
    """
    store = await store_factory.open()
    await add_boards(store, "g0-a", "g1-a")
    new_tag = "lpx:000000aa"
    bad_rssi = np.full(10, -700, dtype=np.int32)
    bad_rssi[3] = 9_999
    first = make_batch("g0-a", 0, tags=[new_tag, *TAGS])
    calls = [
        store.ingest(first),
        store.ingest(first),
        store.ingest(make_batch("g0-a", 0, salt="other")),
        store.ingest(make_batch("g1-a", 0, tags=["lpx:000000bb"], rssi=bad_rssi)),
        store.add_heartbeat(Heartbeat("nobody", 1_800_000_010.0, "boot-1", {})),
        store.ingest(make_batch("g1-a", 1, tags=["lpx:000000bb", new_tag])),
        store.ingest(gap_record("g0-a", 3, 1, 1, 5)),
        store.ingest(make_batch("g0-a", 2)),
    ]
    results = await asyncio.gather(*calls, return_exceptions=True)
    got = [getattr(r, "status", type(r).__name__) for r in results]
    S, D, C = IngestStatus.STORED, IngestStatus.DUPLICATE, IngestStatus.CONFLICT
    # SQLite's writer takes a group in the order it was handed; PostgreSQL's pool runs the three
    # calls for key (g0-a, 0) on connections of their own, so any of them may commit first.
    firsts = [[S, D, C]] if store_factory.backend == "sqlite" else [[S, D, C], [D, S, C], [C, C, S]]
    assert got[:3] in firsts, got
    other_won = got[2] is S
    assert got[3:] == [
        "BadBatch",
        "ValueError" if store_factory.backend == "sqlite" else type(results[4]).__name__,
        IngestStatus.STORED,
        IngestStatus.STORED,
        IngestStatus.STORED,
    ]
    if store_factory.backend == "sqlite":
        assert (store.ingest_commits, store.ingest_batches) == (1, 7)
    await store.close()

    store = await store_factory.open()
    counts = {c.board: c for c in await store.board_counts()}
    assert (counts["g0-a"].batches_total, counts["g0-a"].readings_total) == (3, 20)
    assert (counts["g1-a"].batches_total, counts["g1-a"].readings_total) == (1, 10)
    assert await store.seq_holes() == []
    rows = await store.readings(-np.inf, np.inf)
    assert sorted(set(rows.tag.tolist())) == sorted({new_tag, "lpx:000000bb", *TAGS})
    assert (await store.ingest(make_batch("g1-a", 0))).status is IngestStatus.STORED
    assert (await store.ingest(first)).status is (C if other_won else D)


async def test_a_disk_that_fills_mid_group_fails_the_group_as_unavailable_and_loses_nothing(
    sqlite_factory: StoreFactory,
):
    """
    The file cannot grow while a group of batches (new tags, a heartbeat with its clock sample, a gap
    record) is written: every caller is told the store is unavailable (its board keeps the batch and
    sends it again), nothing of the group is kept, and once there is room the same calls are stored
    with tag ids the rolled-back group did not leave behind in the store's caches.

    The full disk is SQLite's own ``PRAGMA max_page_count`` on the writer's connection: SQLITE_FULL, the
    result code a full file system gives (https://www.sqlite.org/rescode.html#full).
    """
    store = await sqlite_factory.open()
    await add_boards(store, "g0-a", "g1-a")
    assert (await store.ingest(make_batch("g0-a", 0))).status is IngestStatus.STORED

    async def cap_pages(extra: int | None) -> None:
        def job() -> None:
            con = store._wcon
            assert con is not None
            pages = con.execute("PRAGMA page_count").fetchone()[0]
            cap = 2**31 - 2 if extra is None else pages + extra
            assert con.execute(f"PRAGMA max_page_count = {cap}").fetchone()[0] >= pages

        await store._write(job)

    new_tags = [f"lpx:{i:08x}" for i in range(1, 400)]  # more new rows than the free pages can take
    sample = ClockSample("g1-a", "boot-1", 10.0, 1_800_000_000.0, 1_800_000_000.1, 10.2)

    def calls() -> list:
        return [
            store.ingest(make_batch("g0-a", 1, n=400, tags=new_tags)),
            store.add_heartbeat(Heartbeat("g1-a", 1_800_000_010.0, "boot-1", {"i": 1}), clock=sample),
            store.ingest(make_batch("g1-a", 0, n=400, tags=new_tags[::-1])),
            store.ingest(gap_record("g0-a", 3, 2, 2, 5)),
        ]

    await cap_pages(0)
    results = await asyncio.gather(*calls(), return_exceptions=True)
    assert all(isinstance(r, StoreUnavailable) for r in results), results
    assert "full" in str(results[0])
    counts = {c.board: c for c in await store.board_counts()}
    assert (counts["g0-a"].batches_total, counts["g0-a"].readings_total) == (1, 10)
    assert counts["g1-a"].batches_total == 0
    assert await store.latest_heartbeats() == {}
    assert await store.clock_samples("g1-a", "boot-1") == []

    await cap_pages(None)
    results = await asyncio.gather(*calls())
    assert [getattr(r, "status", r) for r in results[:1] + results[2:]] == [IngestStatus.STORED] * 3
    await store.close()
    store = await sqlite_factory.open()
    rows = await store.readings(-np.inf, np.inf)
    assert len(rows.t_collector) == 810
    assert set(rows.tag.tolist()) == set(TAGS) | set(new_tags)
    counts = {c.board: c for c in await store.board_counts()}
    assert (counts["g0-a"].batches_total, counts["g0-a"].readings_total, counts["g0-a"].gap_readings) == (
        3,
        410,
        5,
    )
    assert counts["g1-a"].readings_total == 400
    assert await store.seq_holes() == []
    assert await store.clock_samples("g1-a", "boot-1") == [sample]
    await store.close()
