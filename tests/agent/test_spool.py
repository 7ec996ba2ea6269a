"""The spool: round trip, byte bound and gap records, dead letters, epochs, degraded storage."""

from __future__ import annotations

import asyncio
import contextlib
import gzip
import hashlib
import json
import random
import shutil
import sqlite3
import tempfile
import zlib
from pathlib import Path

import pytest
from hypothesis import HealthCheck, settings
from hypothesis import strategies as st
from hypothesis.stateful import RuleBasedStateMachine, invariant, rule

from listenpost.agent.spool import ROW_OVERHEAD_BYTES, SealedBatch, Spool
from listenpost.core import wire
from listenpost.core.clock import VirtualClock
from listenpost.core.errors import SpoolError
from listenpost.core.records import Reading, Telemetry

FLUSH = 5.0


def reading(i: int, *, tag: str | None = None, rng: random.Random | None = None) -> Reading:
    """A reading whose board time (whole ms) and RSSI (0.1 dB) survive the wire's columnar form."""
    r = rng or random.Random(i)
    return Reading(
        tag or f"lpx:{r.getrandbits(32):08x}", (50_000 + i) * 1_000_000, round(r.uniform(-95, -40), 1)
    )


async def open_spool(path: Path, clock: VirtualClock, max_bytes: int = 1 << 20, **kw) -> Spool:
    return await Spool.open(path, clock=clock, max_bytes=max_bytes, flush_seconds=FLUSH, **kw)


async def drain(spool: Spool) -> list[SealedBatch]:
    """Peek and ack until empty, in order."""
    out = []
    while (b := await spool.peek_oldest()) is not None:
        out.append(b)
        await spool.ack(b.epoch, b.seq)
        assert len(out) < 10_000
    return out


def rows(path: Path) -> list[tuple]:
    """The batches table as an independent connection sees it."""
    with contextlib.closing(sqlite3.connect(path)) as c:
        return c.execute(
            "SELECT epoch, seq, digest, body, n_readings, gap FROM batches ORDER BY id"
        ).fetchall()


class TestRoundTrip:
    async def test_seal_reopen_peek_ack(self, tmp_path: Path, clock: VirtualClock) -> None:
        """Sealed readings survive a reopen, come back in order with their digest, and leave when acked."""
        path = tmp_path / "missing-dir" / "spool.sqlite"
        spool = await open_spool(path, clock)
        epoch = spool.stats().epoch
        assert len(epoch) == 16 and int(epoch, 16) >= 0
        sent: list[list[Reading]] = []
        for k in range(3):
            batch = [reading(100 * k + i) for i in range(40)]
            batch[0] = Reading(
                batch[0].tag, batch[0].t_mono_ns, batch[0].rssi_dbm, Telemetry(2980, 21.5, 7, 120.0)
            )
            for r in batch:
                spool.add(r)
            assert not spool.due()
            await clock.advance(FLUSH)
            assert spool.due()
            sealed = await spool.seal(boot=clock.boot_id, offset_db=2.5)
            assert sealed is not None and (sealed.epoch, sealed.seq, sealed.n_readings) == (epoch, k, 40)
            assert not spool.due() and spool.stats().readings_pending == 0
            sent.append(batch)
        assert await spool.seal(boot=clock.boot_id, offset_db=2.5) is None
        await spool.close()

        spool = await open_spool(path, clock)
        st = spool.stats()
        assert (st.epoch, st.next_seq, st.batches) == (epoch, 3, 3)
        got = await drain(spool)
        assert [b.seq for b in got] == [0, 1, 2]
        for b, batch in zip(got, sent, strict=True):
            assert b.digest == wire.digest(b.content)
            decoded = wire.decode_content(json.loads(b.content))
            assert (decoded.boot, decoded.offset_db, decoded.gap) == (clock.boot_id, 2.5, None)
            assert list(decoded.readings()) == sorted(batch, key=lambda r: r.t_mono_ns)
        spool.add(reading(999))
        await clock.advance(FLUSH)
        b = await spool.seal(boot=clock.boot_id, offset_db=0.0)
        assert b is not None and b.seq == 3  # seq continues across reopen and acks
        await spool.close()
        assert [(r[0], r[1]) for r in rows(path)] == [(epoch, 3)]  # the acks were committed with that seal

    async def test_stored_form_is_sqlite_wal_with_gzip_bodies(
        self, tmp_path: Path, clock: VirtualClock
    ) -> None:
        """The file is an SQLite database in WAL mode; each body is a gzip member of the canonical JSON."""
        path = tmp_path / "spool.sqlite"
        spool = await open_spool(path, clock)
        for i in range(25):
            spool.add(reading(i))
        sealed = await spool.seal(boot="boot-1", offset_db=-1.0)
        assert sealed is not None
        await spool.close()
        head = path.read_bytes()[:20]
        # sqlite.org/fileformat2.html §1.3: magic "SQLite format 3\0"; bytes 18/19 are 2 in WAL mode.
        assert head[:16] == b"SQLite format 3\x00" and head[18:20] == b"\x02\x02"
        with contextlib.closing(sqlite3.connect(path)) as c:
            assert c.execute("PRAGMA journal_mode").fetchone() == ("wal",)
            assert c.execute("PRAGMA integrity_check").fetchone() == ("ok",)
        ((epoch, seq, digest, body, n, gap),) = rows(path)
        # RFC 1952 §2.3.1: ID1 ID2 = 1f 8b, CM = 8 (deflate); read back with zlib's own gzip decoder.
        assert body[:3] == b"\x1f\x8b\x08"
        raw = zlib.decompress(body, wbits=31)
        assert hashlib.sha256(raw).hexdigest() == digest == sealed.digest
        assert raw == sealed.content and (n, gap) == (25, None)

    async def test_ack_is_never_peeked_again(self, tmp_path: Path, clock: VirtualClock) -> None:
        """An acked batch is skipped at once, before its delete is committed."""
        spool = await open_spool(tmp_path / "s.sqlite", clock)
        for k in range(2):
            spool.add(reading(k))
            await spool.seal(boot="b", offset_db=0)
        first = await spool.peek_oldest()
        assert first is not None and first.seq == 0
        await spool.ack(first.epoch, first.seq)
        nxt = await spool.peek_oldest()
        assert nxt is not None and nxt.seq == 1
        assert spool.stats().batches == 1  # the acked one is no backlog, though still on disk
        await spool.ack("0000000000000000", 99)  # unknown keys are harmless
        await spool.ack(nxt.epoch, nxt.seq)
        assert spool.stats().batches == 0  # a drained spool reports no backlog to the heartbeat
        await spool.close()

    async def test_close_seals_pending(self, tmp_path: Path, clock: VirtualClock) -> None:
        """A clean shutdown loses nothing that was added."""
        path = tmp_path / "s.sqlite"
        spool = await open_spool(path, clock)
        for i in range(7):
            spool.add(reading(i))
        await spool.close()
        with pytest.raises(SpoolError, match="closed"):
            spool.add(reading(8)) or await spool.seal(boot="b", offset_db=0)
        ((_, seq, _, _, n, _),) = rows(path)
        assert (seq, n) == (0, 7)

    async def test_large_intake_splits_into_batches_in_one_seal(
        self, tmp_path: Path, clock: VirtualClock
    ) -> None:
        """More than max_batch_readings pending readings become consecutive batches of bounded size."""
        spool = await open_spool(tmp_path / "s.sqlite", clock, max_batch_readings=100)
        for i in range(250):
            spool.add(reading(i))
        last = await spool.seal(boot="b", offset_db=0)
        assert last is not None and last.seq == 2
        got = await drain(spool)
        assert [b.n_readings for b in got] == [100, 100, 50]
        ts = [r.t_mono_ns for b in got for r in wire.decode_content(json.loads(b.content)).readings()]
        assert ts == sorted(ts) and len(set(ts)) == 250
        await spool.close()

    async def test_bad_bounds_name_the_field(self, tmp_path: Path, clock: VirtualClock) -> None:
        """Bad bounds are rejected with the argument's name."""
        with pytest.raises(ValueError, match="max_bytes"):
            await Spool.open(tmp_path / "s", clock=clock, max_bytes=0, flush_seconds=5)
        with pytest.raises(ValueError, match="flush_seconds"):
            await Spool.open(tmp_path / "s", clock=clock, max_bytes=10, flush_seconds=-1)


class TestSealer:
    async def test_run_sealer_seals_every_flush_period(self, tmp_path: Path, clock: VirtualClock) -> None:
        """The sealer task seals on the injected clock; readings never wait longer than flush_seconds."""
        spool = await open_spool(tmp_path / "s.sqlite", clock)
        task = asyncio.create_task(spool.run_sealer(lambda: clock.boot_id, lambda: 1.5))
        await clock.advance(0)
        spool.add(reading(1))
        await clock.advance(FLUSH - 0.01)
        assert spool.stats().batches == 0
        await clock.advance(0.01)
        await _until(lambda: spool.stats().batches == 1)
        spool.add(reading(2))
        await clock.advance(FLUSH)
        await _until(lambda: spool.stats().batches == 2)
        task.cancel()
        with pytest.raises(asyncio.CancelledError):
            await task
        got = await drain(spool)
        assert [wire.decode_content(json.loads(b.content)).offset_db for b in got] == [1.5, 1.5]
        await spool.close()

    async def test_cancelled_seal_still_commits_exactly_once(
        self, tmp_path: Path, clock: VirtualClock
    ) -> None:
        """Cancelling a seal mid-commit neither loses its readings nor seals them twice."""
        path = tmp_path / "s.sqlite"
        spool = await open_spool(path, clock)
        for i in range(500):
            spool.add(reading(i))
        t = asyncio.create_task(spool.seal(boot="b", offset_db=0))
        await asyncio.sleep(0)
        await asyncio.sleep(0)
        t.cancel()
        with pytest.raises(asyncio.CancelledError):
            await t
        for i in range(500, 510):
            spool.add(reading(i))
        await spool.close()
        got = rows(path)
        assert sum(r[4] for r in got) == 510
        ts = [x for r in got for x in wire.decode_content(json.loads(gzip.decompress(r[3]))).t_ms]
        assert len(ts) == len(set(ts)) == 510


async def _until(cond, rounds: int = 200) -> None:
    """Let the worker thread finish a commit (bounded real waits: it is real file I/O)."""
    for _ in range(rounds):
        if cond():
            return
        await asyncio.sleep(0.005)
    raise AssertionError("condition not reached")


def check_accounting(batches: list[SealedBatch], added: dict[int, int], next_seq: int, epoch: str) -> int:
    """
    Every seq below next_seq is spooled or covered by a spooled gap record, and every reading added is
    in a spooled batch or counted by exactly one gap record. Returns the readings the gaps count.
    """
    present = {b.seq for b in batches}
    covered: set[int] = set()
    gap_readings = 0
    for b in batches:
        gap = json.loads(b.content)["gap"]
        if gap is None:
            continue
        assert gap["epoch"] == epoch and gap["reason"] == "spool_full"
        assert gap["last_seq"] < b.seq  # a gap only ever names older seqs
        gap_readings += gap["readings"]
        covered.update(range(gap["first_seq"], gap["last_seq"] + 1))
    assert present | covered >= set(range(next_seq)), "a seq vanished without a gap record"
    data_readings = sum(b.n_readings for b in batches)
    assert data_readings + gap_readings == sum(added.values())
    assert gap_readings == sum(n for s, n in added.items() if s not in present)
    return gap_readings


class TestOverflow:
    async def test_oldest_dropped_with_gap_record(self, tmp_path: Path, clock: VirtualClock) -> None:
        """Past max_bytes the oldest batches go and a gap record with their seq range and count takes the next seq."""
        rng = random.Random(7)
        cap = 20_000
        spool = await open_spool(tmp_path / "s.sqlite", clock, max_bytes=cap)
        added: dict[int, int] = {}
        biggest = 0
        for k in range(30):
            n = rng.randint(20, 60)
            for i in range(n):
                spool.add(reading(1000 * k + i, rng=rng))
            b = await spool.seal(boot="b", offset_db=0)
            assert b is not None
            added[b.seq] = n
            biggest = max(biggest, len(gzip.compress(b.content)) + ROW_OVERHEAD_BYTES)
            assert spool.stats().bytes <= cap + biggest
        st = spool.stats()
        assert st.dropped_batches > 0 and st.dropped_readings > 0
        got = await drain(spool)
        assert [b.seq for b in got] == sorted(b.seq for b in got)
        gap_readings = check_accounting(got, added, st.next_seq, st.epoch)
        assert gap_readings == st.dropped_readings
        first_gap = next(b for b in got if json.loads(b.content)["gap"])
        g = json.loads(first_gap.content)["gap"]
        # The first overflow drops a prefix 0..k-1 of data batches; its gap record takes seq k + 1 or later.
        assert g["first_seq"] == 0 and first_gap.seq > g["last_seq"]
        assert g["readings"] == sum(added[s] for s in range(g["first_seq"], g["last_seq"] + 1))
        assert wire.decode_content(json.loads(first_gap.content)).gap == g  # a valid wire gap record
        await spool.close()

    async def test_long_outage_folds_gap_records(self, tmp_path: Path, clock: VirtualClock) -> None:
        """Over many overflows the gap records fold into few, and nothing is counted twice."""
        rng = random.Random(11)
        spool = await open_spool(tmp_path / "s.sqlite", clock, max_bytes=12_000)
        added: dict[int, int] = {}
        for k in range(150):
            n = rng.randint(5, 40)
            for i in range(n):
                spool.add(reading(1000 * k + i, rng=rng))
            b = await spool.seal(boot="b", offset_db=0)
            added[b.seq] = n
        st = spool.stats()
        got = await drain(spool)
        gaps = [b for b in got if json.loads(b.content)["gap"]]
        # Folding keeps the gap records few: one per overflow still in the queue, not one per drop.
        gap_bytes = sum(len(gzip.compress(b.content)) + ROW_OVERHEAD_BYTES for b in gaps)
        assert 1 <= len(gaps) <= 6 and gap_bytes < st.bytes / 3
        assert check_accounting(got, added, st.next_seq, st.epoch) == st.dropped_readings
        await spool.close()


class TestDeadLettersAndEpochs:
    async def test_dead_letter_moves_aside_and_reports(self, tmp_path: Path, clock: VirtualClock) -> None:
        """A refused batch leaves the queue, is kept aside, counted, and a dead_letter gap record names it."""
        path = tmp_path / "s.sqlite"
        spool = await open_spool(path, clock)
        for k in range(3):
            for i in range(10 + k):
                spool.add(reading(100 * k + i))
            await spool.seal(boot="b", offset_db=0)
        epoch = spool.stats().epoch
        await spool.dead_letter(epoch, 1, 400, "content.readings: bad")
        await spool.dead_letter(epoch, 1, 400, "again")  # already gone: no second count
        assert spool.stats().dead_letters == 1
        got = await drain(spool)
        assert [b.seq for b in got] == [0, 2, 3]
        gap = json.loads(got[-1].content)["gap"]
        assert gap == {
            "epoch": epoch,
            "first_seq": 1,
            "last_seq": 1,
            "readings": 11,
            "reason": "dead_letter",
            "status": 400,
        }
        assert wire.decode_content(json.loads(got[-1].content)).gap == gap
        await spool.close()
        with contextlib.closing(sqlite3.connect(path)) as c:
            assert c.execute(
                "SELECT epoch, seq, status, reason, n_readings FROM dead_letters"
            ).fetchall() == [(epoch, 1, 400, "content.readings: bad", 11)]

    async def test_refused_gap_record_makes_no_new_gap(self, tmp_path: Path, clock: VirtualClock) -> None:
        """Dead-lettering a gap record does not start a loop of gap records."""
        spool = await open_spool(tmp_path / "s.sqlite", clock)
        spool.add(reading(1))
        await spool.seal(boot="b", offset_db=0)
        e = spool.stats().epoch
        await spool.dead_letter(e, 0, 413, "too large")
        gap = await spool.peek_oldest()
        assert gap is not None and gap.seq == 1 and json.loads(gap.content)["gap"]["reason"] == "dead_letter"
        await spool.dead_letter(e, 1, 400, "refused")
        assert await spool.peek_oldest() is None
        assert spool.stats().dead_letters == 2 and spool.stats().next_seq == 2
        await spool.close()

    async def test_new_epoch_keeps_old_keys(self, tmp_path: Path, clock: VirtualClock) -> None:
        """After new_epoch seq restarts at 0 under a fresh epoch; old batches keep their old key."""
        path = tmp_path / "s.sqlite"
        spool = await open_spool(path, clock)
        for k in range(2):
            spool.add(reading(k))
            await spool.seal(boot="b", offset_db=0)
        old = spool.stats().epoch
        new = await spool.new_epoch("digest_conflict")
        assert new != old and len(new) == 16 and int(new, 16) >= 0
        assert (spool.stats().epoch, spool.stats().next_seq) == (new, 0)
        spool.add(reading(5))
        b = await spool.seal(boot="b", offset_db=0)
        assert b is not None and (b.epoch, b.seq) == (new, 0)
        await spool.close()
        spool = await open_spool(path, clock)
        assert (spool.stats().epoch, spool.stats().next_seq) == (new, 1)
        assert [(b.epoch, b.seq) for b in await drain(spool)] == [(old, 0), (old, 1), (new, 0)]
        await spool.close()


class TestDegraded:
    async def test_disk_full_buffers_in_ram_then_recovers(self, tmp_path: Path, clock: VirtualClock) -> None:
        """SQLITE_FULL on a seal: readings stay in RAM, the flag is set, a timed retry seals them all."""
        path = tmp_path / "s.sqlite"
        spool = await open_spool(path, clock)
        spool.add(reading(0))
        await spool.seal(boot="b", offset_db=0)
        # Fault injection at the storage edge: cap the database's page count on the spool's own
        # connection, so the next growth fails with SQLITE_FULL as a full card would.
        disk = spool._disk
        pages = await spool._run(lambda: disk.conn.execute("PRAGMA page_count").fetchone()[0])
        await spool._run(lambda: disk.conn.execute(f"PRAGMA max_page_count={pages}"))
        rng = random.Random(3)
        for i in range(1, 3000):
            spool.add(reading(i, rng=rng))
        assert await spool.seal(boot="b", offset_db=0) is None
        st = spool.stats()
        assert st.degraded and st.readings_pending == 2999 and st.batches == 1
        for i in range(3000, 3010):
            spool.add(reading(i))
        # Not due yet: no new attempt on the same commit.
        assert await spool.seal(boot="b", offset_db=0) is None and spool.stats().degraded
        await clock.advance(FLUSH)
        b = await spool.seal(boot="b", offset_db=0)  # reopened: the page cap is gone
        assert b is not None and not spool.stats().degraded
        got = await drain(spool)
        assert sum(x.n_readings for x in got) == 3010
        await spool.close()

    async def test_a_batch_is_queued_as_its_readings_one_by_one(
        self, tmp_path: Path, clock: VirtualClock
    ) -> None:
        """add_many keeps order and, past the memory bound, drops and counts as add per reading does."""
        one = await open_spool(tmp_path / "one.sqlite", clock, max_pending_readings=100)
        many = await open_spool(tmp_path / "many.sqlite", clock, max_pending_readings=100)
        readings = [reading(i) for i in range(130)]
        for r in readings:
            one.add(r)
        for i in range(0, len(readings), 40):
            many.add_many(readings[i : i + 40])
        many.add_many([])
        assert (many.stats().readings_pending, many.stats().dropped_readings) == (100, 30)
        got = [await s.seal(boot="b", offset_db=0) for s in (one, many)]
        assert got[0] is not None and got[1] is not None and got[0].content == got[1].content
        await one.close()
        await many.close()

    async def test_ram_buffer_is_capped_and_counted(self, tmp_path: Path, clock: VirtualClock) -> None:
        """Past max_pending_readings the oldest readings are dropped and counted, durably after the next seal."""
        path = tmp_path / "s.sqlite"
        spool = await open_spool(path, clock, max_pending_readings=100)
        for i in range(130):
            spool.add(reading(i))
        st = spool.stats()
        assert (st.readings_pending, st.dropped_readings) == (100, 30)
        b = await spool.seal(boot="b", offset_db=0)
        assert b is not None and wire.decode_content(json.loads(b.content)).t_ms[0] == 50_030
        await spool.close()
        spool = await open_spool(path, clock)
        assert spool.stats().dropped_readings == 30
        await spool.close()


# ---------------------------------------------------------------------------- model-based


class SpoolMachine(RuleBasedStateMachine):
    """
    Random sequences of add, seal, peek, ack, dead letter, new epoch, reopen and overflow against a small
    model: each sealed batch is spooled, acked, dead-lettered or covered by a gap record; no key ever
    has two digests; the byte bound holds (plus one batch).
    """

    CAP = 6_000

    def __init__(self) -> None:
        super().__init__()
        self.loop = asyncio.new_event_loop()
        self.dir = Path(tempfile.mkdtemp(prefix="spool-sm-"))
        self.path = self.dir / "spool.sqlite"
        self.clock = VirtualClock()
        self.spool = self.run(open_spool(self.path, self.clock, max_bytes=self.CAP))
        self.next_id = 0
        self.digests: dict[tuple[str, int], str] = {}
        self.readings: dict[tuple[str, int], int] = {}
        self.done: set[tuple[str, int]] = set()  # acked or dead-lettered
        self.covered: set[tuple[str, int]] = set()  # named by a gap record that was acked
        self.biggest = 0
        self.finished_readings = 0  # in acked/dead-lettered batches and acked gaps

    def run(self, coro):
        return self.loop.run_until_complete(coro)

    @rule(n=st.integers(1, 60))
    def add(self, n: int) -> None:
        rng = random.Random(self.next_id)
        for _ in range(n):
            self.spool.add(reading(self.next_id, rng=rng))
            self.next_id += 1

    @rule()
    def seal(self) -> None:
        b = self.run(self.spool.seal(boot="b", offset_db=0.0))
        if b is not None:
            key = (b.epoch, b.seq)
            assert key not in self.digests, f"{key} cut twice"
            self.digests[key] = b.digest
            self.readings[key] = b.n_readings
            self.biggest = max(self.biggest, len(gzip.compress(b.content)) + ROW_OVERHEAD_BYTES)
        assert self.spool.stats().readings_pending == 0 or self.spool.stats().degraded

    def _head(self) -> SealedBatch | None:
        b = self.run(self.spool.peek_oldest())
        if b is not None:
            key = (b.epoch, b.seq)
            assert self.digests.setdefault(key, b.digest) == b.digest, f"{key} has two digests"
            assert key not in self.done, f"{key} came back after ack or dead letter"
        return b

    @rule()
    def ack_head(self) -> None:
        b = self._head()
        if b is not None:
            self.run(self.spool.ack(b.epoch, b.seq))
            self.done.add((b.epoch, b.seq))
            self.finished_readings += b.n_readings
            if (gap := json.loads(b.content)["gap"]) is not None:
                self.covered.update((gap["epoch"], s) for s in range(gap["first_seq"], gap["last_seq"] + 1))
                if gap["reason"] == "spool_full":
                    self.finished_readings += gap["readings"]

    @rule()
    def dead_letter_head(self) -> None:
        b = self._head()
        if b is not None:
            self.run(self.spool.dead_letter(b.epoch, b.seq, 400, "refused"))
            self.done.add((b.epoch, b.seq))
            self.finished_readings += b.n_readings  # its dead_letter gap record repeats, not adds, this count

    @rule()
    def new_epoch(self) -> None:
        self.run(self.spool.new_epoch("digest_conflict"))

    @rule()
    def reopen(self) -> None:
        self.run(self.spool.close())
        self.spool = self.run(open_spool(self.path, self.clock, max_bytes=self.CAP))

    @invariant()
    def bounded(self) -> None:
        assert self.spool.stats().bytes <= self.CAP + self.biggest

    def _on_disk(self) -> tuple[dict[tuple[str, int], str], set[tuple[str, int]], int]:
        """Keys and digests in the file, seqs its gap records name, readings it accounts for."""
        present, covered, readings = {}, set(), 0
        with contextlib.closing(sqlite3.connect(self.path)) as c:
            for epoch, seq, digest, gap, n in c.execute(
                "SELECT epoch, seq, digest, gap, n_readings FROM batches"
            ):
                present[(epoch, seq)] = digest
                readings += n
                if gap is not None:
                    g = json.loads(gap)
                    covered.update((g["epoch"], s) for s in range(g["first_seq"], g["last_seq"] + 1))
                    readings += g["readings"] if g["reason"] == "spool_full" else 0
        return present, covered, readings

    @invariant()
    def nothing_vanishes(self) -> None:
        present, covered, _ = self._on_disk()
        for key, digest in present.items():
            assert self.digests.get(key, digest) == digest
        for key in self.readings:
            assert key in present or key in self.done or key in self.covered or key in covered, (
                f"{key} vanished without a gap record"
            )

    def _acked_but_on_disk(self) -> int:
        """Readings of finished batches whose lazy delete had not been committed (none after close)."""
        present, _, _ = self._on_disk()
        assert not (set(present) & self.done), "close left acked batches behind"
        return 0

    def teardown(self) -> None:
        try:
            self.run(self.spool.close())
            # Every reading added is in a spooled or finished batch, or counted by exactly one gap record.
            _, _, on_disk = self._on_disk()
            assert on_disk - self._acked_but_on_disk() + self.finished_readings == self.next_id
        finally:
            self.loop.close()
            shutil.rmtree(self.dir, ignore_errors=True)


TestSpoolMachine = SpoolMachine.TestCase
TestSpoolMachine.settings = settings(
    max_examples=25, stateful_step_count=30, deadline=None, suppress_health_check=[HealthCheck.too_slow]
)
