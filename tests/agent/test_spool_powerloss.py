"""
Power loss at the spool's durable points (docs/reliability.md §4 item 2a): the test that catches seq reuse.

The real Spool and Uplink run on virtual time against the real collector app (SQLite under tmp_path, on
loopback). After every durable commit of the spool (the FULL-synchronous seal, dead-letter and epoch
commits) the harness copies the spool's files (db, -wal, -shm) on the spool's own worker thread, right
after the commit and before any other statement. "Pulling the plug" stops every task abruptly and brings
the board back on a copy: whatever the spool committed after it (NORMAL ack deletes, later seals) is
forgotten, as a power cut with synchronous=NORMAL bookkeeping would forget it, while the collector keeps
what it received. The board restarts with a new boot id on the restored files and carries on.

Oracle (set membership, every reading has its own identity (boot, board ms)):
- no reading is stored twice, and nothing is stored that was not generated;
- every reading sealed in a commit the board still remembers is stored, or it sits in a batch the
  board dead-lettered after a 409 and the collector holds the gap record counting it;
- readings the board lost are only those still in RAM at a cut (never sealed), at most a flush period's;
- one digest per (epoch, seq) at the collector; a key the board sent with two digests got a 409 and
  the board moved to a new epoch.

Scenario "after": copies at every durable point (the design) — no key is ever re-cut: no 409, one epoch,
and the forgotten acks show up as duplicates the collector absorbed. Scenario "seal lost": the copy is the
one from *before* a seal whose batch the collector had already stored, so the restored spool re-cuts that
seq with other readings: the collector answers 409, the board starts a new epoch. The re-cut batch's
readings are then not stored but counted: the board keeps the batch in its dead-letter table and seals a
gap record the collector stores. Sending them again under a fresh key would store them, but under this
very failure (a durable commit lost) the re-keying commit can be lost too, and the batch would come back
under its old key after the next cut and be stored twice; a counted loss with the data still on the board
is the safer failure. Each test prints its figures (pytest -s).
"""

from __future__ import annotations

import asyncio
import contextlib
import gzip
import json
import random
import sqlite3
import threading
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import aiohttp
import pytest

from listenpost.agent.client.uplink import Outcome, Uplink
from listenpost.agent.spool import Spool
from listenpost.core import wire
from listenpost.core.clock import DerivedClock, VirtualClock
from listenpost.core.records import Reading

BOARD = "g3-a"
TOKEN = "tok-g3-a-powerloss-0123456789ab"
CODE = "BRK-G3A-5521"
TAGS = [f"ibeacon:4d2a0c1e-7f3b-4c55-9e61-2b8f0a7d3c10:7:{m}" for m in (11, 12, 13, 14)]
FLUSH_S = 2.0
PERIOD_S = 0.05
"""One reading every 50 ms of board time: (boot, board ms) is unique."""
STEP_S = 0.1
SUFFIXES = ("", "-wal", "-shm")

Key = tuple[str, int]
"""A reading's identity: (boot the reading was taken in, board monotonic ms)."""


@dataclass(frozen=True, slots=True)
class Snapshot:
    """The spool files right after one durable commit, and the readings sealed as of then."""

    files: dict[str, bytes]
    sealed: frozenset[Key]
    what: str
    batches: tuple[tuple[str, int], ...]
    """(epoch, seq) of the batches this commit sealed."""


def copy_files(path: Path) -> dict[str, bytes]:
    out = {}
    for sfx in SUFFIXES:
        p = Path(str(path) + sfx)
        if p.exists():
            out[sfx] = p.read_bytes()
    return out


def restore_files(path: Path, files: dict[str, bytes]) -> None:
    path.parent.mkdir(parents=True)
    for sfx, data in files.items():
        Path(str(path) + sfx).write_bytes(data)


def batch_keys(content: dict[str, Any]) -> set[Key]:
    d = wire.decode_content(content)
    return {(d.boot, r.t_mono_ns // 1_000_000) for r in d.readings()}


def collector_rows(db: Path) -> tuple[Counter[Key], dict[tuple[str, int], set[str]], list[tuple]]:
    """What the collector stored, read from its file by an independent connection."""
    with contextlib.closing(sqlite3.connect(db)) as c:
        stored = Counter(
            (boot, t)
            for boot, t in c.execute(
                "SELECT b.boot, r.t_board_ms FROM readings r JOIN batches b ON b.id = r.batch_id"
            )
        )
        digests: dict[tuple[str, int], set[str]] = {}
        for epoch, seq, dig in c.execute("SELECT epoch, seq, digest FROM batches"):
            digests.setdefault((epoch, seq), set()).add(dig)
        gaps = c.execute(
            "SELECT epoch, seq, gap_first, gap_last, gap_readings, gap_reason FROM batches"
            " WHERE gap_reason IS NOT NULL"
        ).fetchall()
    return stored, digests, gaps


def dead_letters(path: Path) -> list[tuple[str, int, int, bytes]]:
    with contextlib.closing(sqlite3.connect(path)) as c:
        return c.execute("SELECT epoch, seq, status, body FROM dead_letters ORDER BY id").fetchall()


@dataclass
class Harness:
    """The world outside the board: the generated readings, what was sealed, what was sent, the cuts."""

    tmp: Path
    base: VirtualClock
    url: str
    seed: int
    generated: set[Key] = field(default_factory=set)
    ever_sealed: set[Key] = field(default_factory=set)
    sends: list[tuple[str, int, str, Outcome]] = field(default_factory=list)
    duplicates: int = 0
    conflicts: int = 0
    cuts: list[dict[str, Any]] = field(default_factory=list)
    lives: int = 0


class Life:
    """One boot of the board: spool, sealer, uplink and a reading producer, with the copy hook."""

    def __init__(self, h: Harness, lineage: frozenset[Key]) -> None:
        self.h = h
        h.lives += 1
        self.dir = h.tmp / f"life{h.lives}"
        self.path = self.dir / "spool.sqlite"
        self.clock = DerivedClock(h.base, boot_id=f"boot-{h.lives}")
        self.sealed = set(lineage)
        """Readings sealed in commits this board remembers (its restored copy's, then its own)."""
        self.snapshots: list[Snapshot] = []
        self.lock = threading.Lock()
        self.dead = False
        self.tasks: list[asyncio.Task[Any]] = []

    async def start(self, files: dict[str, bytes] | None) -> None:
        if files is not None:
            restore_files(self.path, files)
        self.spool = await Spool.open(self.path, clock=self.clock, max_bytes=8 << 20, flush_seconds=FLUSH_S)
        self.snapshots.append(Snapshot(copy_files(self.path), frozenset(self.sealed), "open", ()))
        disk = self.spool._disk  # the hook sits on the worker-thread side, right after each durable commit
        for name in ("seal", "dead_letter", "start_epoch"):
            setattr(disk, name, self._hooked(name, getattr(disk, name)))
        self.session = aiohttp.ClientSession()
        self.uplink = Uplink(
            base_url=self.h.url,
            token=TOKEN,
            board=BOARD,
            clock=self.clock,
            spool=self.spool,
            session=self.session,
            timeout_s=5.0,
            backoff_initial_s=0.5,
            backoff_max_s=2.0,
            idle_poll_s=0.25,
            rng=random.Random(self.h.seed + self.h.lives),
        )
        send = self.uplink.send

        async def observed_send(batch: Any) -> tuple[Outcome, float | None]:
            outcome, retry_after = await send(batch)
            self.h.sends.append((batch.epoch, batch.seq, batch.digest, outcome))
            return outcome, retry_after

        self.uplink.send = observed_send  # type: ignore[method-assign]
        self.tasks = [
            asyncio.create_task(self._produce()),
            asyncio.create_task(self.spool.run_sealer(lambda: self.clock.boot_id, lambda: 0.0)),
            asyncio.create_task(self.uplink.run()),
        ]

    def _hooked(self, name: str, fn: Any) -> Any:
        def after_commit(*args: Any) -> Any:
            result = fn(*args)  # raises if nothing was committed
            with self.lock:
                if not self.dead:  # a commit finishing after the plug was pulled never happened
                    keys: tuple[tuple[str, int], ...] = ()
                    if name == "seal":
                        for b in result:
                            self.sealed |= batch_keys(json.loads(b.content))
                        keys = tuple((b.epoch, b.seq) for b in result)
                    self.h.ever_sealed |= self.sealed
                    self.snapshots.append(Snapshot(copy_files(self.path), frozenset(self.sealed), name, keys))
            return result

        return after_commit

    async def _produce(self) -> None:
        i = 0
        while True:
            await self.clock.sleep(PERIOD_S)
            r = Reading(TAGS[i % len(TAGS)], self.clock.monotonic_ns(), -60.0 - i % 30)
            self.spool.add(r)
            self.h.generated.add((self.clock.boot_id, r.t_mono_ns // 1_000_000))
            i += 1

    def acked(self, key: tuple[str, int]) -> bool:
        return any((e, s) == key and o is Outcome.ACKED for e, s, _, o in self.h.sends)

    async def pull_plug(self) -> None:
        """Stop everything at once; the files in this life's folder are never looked at again."""
        with self.lock:
            self.dead = True
        for t in self.tasks:
            t.cancel()
        await asyncio.gather(*self.tasks, return_exceptions=True)
        self.h.duplicates += self.uplink.counters.duplicates
        self.h.conflicts += self.uplink.counters.conflicts
        # Shielded spool work still running finishes on its thread; then its connection is closed there.
        # Nothing is sealed: readings in RAM are lost, as in a power cut.
        await asyncio.gather(*self.spool._inflight, return_exceptions=True)
        await asyncio.get_running_loop().run_in_executor(self.spool._executor, self.spool._disk.close)
        self.spool._executor.shutdown(wait=True)
        await self.session.close()

    async def stop_clean(self) -> None:
        for t in self.tasks:
            t.cancel()
        await asyncio.gather(*self.tasks, return_exceptions=True)
        self.h.duplicates += self.uplink.counters.duplicates
        self.h.conflicts += self.uplink.counters.conflicts
        await self.session.close()


async def advance(h: Harness, life: Life, seconds: float) -> None:
    for _ in range(round(seconds / STEP_S)):
        await asyncio.wait(life.tasks, timeout=0.002)  # bounded real wait: loopback I/O and SQLite threads
        # Virtual time stands still while a spool commit runs on its thread (as if the card were fast),
        # so how much a cut loses depends on the flush period, not on this machine's fsync.
        await asyncio.wait_for(life.spool.idle(), 5)
        for t in life.tasks:
            if t.done():
                t.result()
        await h.base.advance(STEP_S)


async def drained(h: Harness, life: Life, limit_s: float = 120.0) -> None:
    """Stop producing, seal the rest, and let the uplink empty the spool."""
    life.tasks[0].cancel()
    await asyncio.gather(life.tasks[0], return_exceptions=True)
    life.tasks = life.tasks[1:]
    waited = 0.0
    while True:
        await advance(h, life, 1.0)
        waited += 1.0
        st = life.spool.stats()
        if st.readings_pending == 0 and await life.spool.peek_oldest() is None:
            return
        assert waited < limit_s, f"the spool did not drain: {st}"


@pytest.fixture
async def collector(aiohttp_server, tmp_path: Path) -> tuple[str, Path, VirtualClock]:
    from listenpost.collector.app import create_app
    from listenpost.collector.config import CollectorSettings
    from listenpost.collector.http.auth import code_hash, hash_secret
    from listenpost.collector.state import STORE
    from listenpost.collector.store import Board, Enrollment

    base = VirtualClock()
    (tmp_path / "collector").mkdir()
    settings = CollectorSettings(state_dir=str(tmp_path / "collector"))
    app = create_app(settings, clock=base, run_monitor=False)
    server = await aiohttp_server(app)
    store = app[STORE]
    await store.add_board(
        Board(BOARD, "G3", "ground", base.time()), Enrollment(BOARD, code_hash(CODE), base.time() + 3600)
    )
    await store.complete_enrollment(
        code_hash(CODE), hash_secret(TOKEN), {"machine_id": "powerloss"}, base.time()
    )
    await store.add_tags(TAGS, base.time())
    db = Path(settings.resolved_db_url().removeprefix("sqlite:///"))
    return str(server.make_url("")).rstrip("/"), db, base


async def run_with_cuts(
    tmp_path: Path, collector: tuple[str, Path, VirtualClock], *, seed: int, cuts: int, seal_lost: bool
) -> tuple[Harness, Life]:
    url, _, base = collector
    rng = random.Random(seed)
    h = Harness(tmp_path / "board", base, url, seed)
    life = Life(h, frozenset())
    await life.start(None)
    for _ in range(cuts):
        await advance(h, life, rng.uniform(3.0, 9.0))
        if seal_lost:
            # Wait for a moment when the newest durable commit is a seal the collector already stored.
            for _ in range(200):
                last = life.snapshots[-1]
                if last.what == "seal" and last.batches and all(life.acked(k) for k in last.batches):
                    break
                await advance(h, life, STEP_S)
            else:
                raise AssertionError("no uploaded seal to lose")
        await life.pull_plug()
        back = life.snapshots[-2] if seal_lost else life.snapshots[-1]
        lost = life.snapshots[-1].sealed - back.sealed if seal_lost else frozenset()
        h.cuts.append(
            {
                "restored": back.what,
                "lost_seal_readings": lost,
                "unsealed": len({k for k in h.generated if k[0] == life.clock.boot_id} - life.sealed),
            }
        )
        life = Life(h, back.sealed)
        await life.start(back.files)
    await advance(h, life, 5.0)
    await drained(h, life)
    return h, life


def check(h: Harness, life: Life, db: Path) -> dict[str, int]:
    stored, digests, gaps = collector_rows(db)
    # Nothing twice, nothing invented.
    assert max(stored.values()) == 1, f"stored twice: {[k for k, n in stored.items() if n > 1][:5]}"
    assert set(stored) <= h.generated
    # One digest per key at the collector; every key the board sent with two digests was answered 409.
    assert all(len(d) == 1 for d in digests.values())
    sent: dict[tuple[str, int], set[str]] = {}
    for epoch, seq, dig, _ in h.sends:
        sent.setdefault((epoch, seq), set()).add(dig)
    recut = {k for k, d in sent.items() if len(d) > 1}
    conflicted = {(e, s) for e, s, _, o in h.sends if o is Outcome.CONFLICT}
    assert recut <= conflicted, f"a key went out with two digests and no 409 caught it: {recut - conflicted}"
    assert conflicted <= recut  # and no 409 without a re-cut
    # Every reading sealed in a commit the board remembers is stored, or it is in a batch the board
    # dead-lettered after the 409 (kept on the board) and the collector holds a gap record counting it.
    refused: set[Key] = set()
    for _, _, status, body in dead_letters(life.path):
        assert status == 409
        refused |= batch_keys(json.loads(gzip.decompress(body)))
    missing = life.sealed - set(stored)
    assert missing == refused, f"sealed, not stored and not counted: {sorted(missing - refused)[:5]}"
    assert sum(n for *_, n, reason in gaps if reason == "dead_letter") == len(refused)
    # What the board lost without a count is only what was still in RAM at the cuts.
    never_sealed = h.generated - h.ever_sealed
    assert h.generated - set(stored) <= never_sealed | refused
    worst = max((c["unsealed"] for c in h.cuts), default=0)
    assert worst <= (FLUSH_S + 1.0) / PERIOD_S, h.cuts  # a flush period, plus a seal still committing
    return {
        "generated": len(h.generated),
        "stored": sum(stored.values()),
        "duplicates_absorbed": h.duplicates,
        "conflicts_409": h.conflicts,
        "recut_keys": len(recut),
        "epochs": len({e for e, *_ in h.sends}),
        "lost_unsealed": len(never_sealed),
        "max_unsealed_per_cut": worst,
        "refused_counted": len(refused),
        "cuts": len(h.cuts),
    }


# ------------------------------------------------------------------------------------------ tests


@pytest.mark.parametrize("seed", [11, 29])
async def test_copies_after_each_durable_commit_never_reuse_a_seq(
    collector, tmp_path: Path, seed: int
) -> None:
    """The design: seals are FULL-durable, so a restored spool never re-cuts a key; forgotten acks are absorbed."""
    h, life = await run_with_cuts(tmp_path, collector, seed=seed, cuts=4, seal_lost=False)
    await life.stop_clean()
    figures = check(h, life, collector[1])
    print(f"\npower loss after durable commits, seed {seed}: {figures}")
    assert figures["conflicts_409"] == 0 and figures["recut_keys"] == 0 and figures["epochs"] == 1
    assert figures["refused_counted"] == 0  # every remembered reading is stored
    assert figures["duplicates_absorbed"] > 0  # anti-vacuity: forgotten acks really caused resends
    assert life.spool.stats().epoch == next(iter({e for e, *_ in h.sends}))
    await life.spool.close()


async def test_a_lost_seal_is_caught_by_its_digest_and_a_new_epoch(collector, tmp_path: Path) -> None:
    """The copy predates a seal the collector already stored: the re-cut seq gets 409, the board moves epoch."""
    h, life = await run_with_cuts(tmp_path, collector, seed=5, cuts=2, seal_lost=True)
    await life.stop_clean()
    figures = check(h, life, collector[1])
    print(f"\npower loss losing an uploaded seal: {figures}")
    assert (
        figures["recut_keys"] == figures["conflicts_409"] == figures["cuts"]
    )  # one re-cut seq per lost seal
    assert figures["epochs"] == 1 + figures["cuts"]  # each epoch with a re-cut seq was left for a new one
    # Not stored, but not silent either: those readings are in the board's dead-letter table and the
    # collector's gap records count them (check() matched the two sets exactly).
    assert figures["refused_counted"] > 0
    # The lost seals' readings had reached the collector before the cut: stored (once, checked above).
    stored, _, _ = collector_rows(collector[1])
    for cut in h.cuts:
        assert cut["lost_seal_readings"] and cut["lost_seal_readings"] <= set(stored)
    await life.spool.close()
