"""
The spool under faults: SIGKILL of a real process at random moments and at named crash points, a real
write failure (RLIMIT_FSIZE), and a table of damaged files in the style of docs/reliability.md §4 item 5.
"""

from __future__ import annotations

import asyncio
import contextlib
import gzip
import json
import os
import random
import shutil
import signal
import sqlite3
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

import pytest

from listenpost.agent.spool import Spool
from listenpost.core import wire
from listenpost.core.clock import VirtualClock

CHILD = Path(__file__).with_name("spool_child.py")
ROOT = Path(__file__).resolve().parents[2]
FLUSH = 0.05
LINE_TIMEOUT_S = 20.0
BOOTTIME = getattr(time, "CLOCK_BOOTTIME", time.CLOCK_MONOTONIC)


def spooled(path: Path) -> dict[tuple[str, int], tuple[str, list[int], dict | None]]:
    """(epoch, seq) -> (digest, reading ids, gap) as an independent connection reads the file."""
    out = {}
    with contextlib.closing(sqlite3.connect(path)) as c:
        for epoch, seq, digest, body in c.execute("SELECT epoch, seq, digest, body FROM batches ORDER BY id"):
            content = json.loads(gzip.decompress(body))
            assert wire.digest(content) == digest
            d = wire.decode_content(content)
            out[(epoch, seq)] = (digest, [int(t.split(":")[1], 16) for t in d.tags], d.gap)
    return out


async def reopen(path: Path) -> tuple[Spool, VirtualClock]:
    clock = VirtualClock()
    return await Spool.open(path, clock=clock, max_bytes=64 << 20, flush_seconds=5.0), clock


@dataclass
class ChildRun:
    """What one child process reported before it died."""

    ready_epoch: str = ""
    ready_next_seq: int = 0
    added: list[tuple[int, float]] = field(default_factory=list)
    sealed: dict[tuple[str, int], tuple[str, int]] = field(default_factory=dict)
    acked: dict[tuple[str, int], range] = field(default_factory=dict)
    """Acked keys and the reading ids their batch held."""
    other: list[list[str]] = field(default_factory=list)
    killed_at: float = 0.0


async def run_child(
    path: Path, first_id: int, *, kill_after_lines: int | None, crash: str = "", stderr: Path
) -> ChildRun:
    env = {**os.environ, "PYTHONPATH": str(ROOT), "LISTENPOST_SPOOL_CHILD_CRASH": crash}
    err = await asyncio.to_thread(open, stderr, "ab")
    try:
        proc = await asyncio.create_subprocess_exec(
            sys.executable,
            str(CHILD),
            str(path),
            str(first_id),
            str(FLUSH),
            str(64 << 20),
            stdout=asyncio.subprocess.PIPE,
            stderr=err,
            env=env,
        )
    finally:
        err.close()
    run = ChildRun()
    lines = 0
    try:
        while True:
            raw = await asyncio.wait_for(proc.stdout.readline(), LINE_TIMEOUT_S)
            if not raw:
                break
            parts = raw.decode().split()
            match parts:
                case ["ready", epoch, next_seq]:
                    run.ready_epoch, run.ready_next_seq = epoch, int(next_seq)
                case ["a", i, mono]:
                    run.added.append((int(i), float(mono)))
                case ["s", epoch, seq, digest, n]:
                    run.sealed[(epoch, int(seq))] = (digest, int(n))
                case ["k", epoch, seq, first, last, n]:
                    ids = range(int(first), int(last) + 1)
                    assert len(ids) == int(n), f"acked batch {seq} holds non-consecutive ids"
                    run.acked[(epoch, int(seq))] = ids
                case _:
                    run.other.append(parts)
            lines += 1
            if kill_after_lines is not None and lines >= kill_after_lines:
                run.killed_at = time.clock_gettime(BOOTTIME)
                proc.send_signal(signal.SIGKILL)
                break
    finally:
        if kill_after_lines is None:
            try:
                await asyncio.wait_for(proc.wait(), LINE_TIMEOUT_S)
            except TimeoutError:
                pass
        if proc.returncode is None:
            proc.kill()
        await proc.wait()
    return run


class TestSigkill:
    async def test_random_kills_lose_only_the_unsealed_window(self, tmp_path: Path) -> None:
        """
        SIGKILL at random moments, many times over one spool file: every batch the child saw sealed is
        still there (or was acked), keys are never reused, no reading is stored twice, seqs are contiguous,
        and only readings younger than the flush window are lost.
        """
        path = tmp_path / "spool.sqlite"
        master = random.Random(int(os.environ.get("LISTENPOST_TEST_SEED", "20261202")))
        seeds = [master.randrange(2**32) for _ in range(12)]
        print("kill seeds:", seeds)
        history: dict[tuple[str, int], str] = {}  # every key ever seen -> its digest (never re-cut)
        owner: dict[int, tuple[str, int]] = {}  # reading id -> the one key that holds it
        acked: set[tuple[str, int]] = set()
        worst_loss_s = 0.0
        worst_loss_n = 0
        epoch = None
        for run_no, seed in enumerate(seeds):
            rng = random.Random(seed)
            first_id = run_no * 10_000_000
            run = await run_child(
                path, first_id, kill_after_lines=rng.randint(3, 45), stderr=tmp_path / "child.err"
            )
            assert run.ready_epoch, (
                f"seed {seed}: child never got ready: {(tmp_path / 'child.err').read_text()}"
            )
            epoch = epoch or run.ready_epoch
            assert run.ready_epoch == epoch, "a kill must not start a new epoch"
            spool, _ = await reopen(path)
            st = spool.stats()
            assert (st.corrupt_set_aside, st.degraded, st.epoch) == (0, False, epoch)
            await spool.close()
            now = spooled(path)
            acked.update(run.acked)
            for key in run.sealed:
                assert key in now or key in acked, f"seed {seed}: sealed {key} vanished"
            held = {key: ids for key, (_, ids, _) in now.items()}
            held.update({key: list(ids) for key, ids in run.acked.items() if key not in held})
            for key, ids in held.items():
                if key in now:
                    assert history.setdefault(key, now[key][0]) == now[key][0], f"seed {seed}: {key} re-cut"
                for i in ids:
                    assert owner.setdefault(i, key) == key, (
                        f"seed {seed}: reading {i} in {owner[i]} and {key}"
                    )
            for key, (digest, _n) in run.sealed.items():
                assert history.setdefault(key, digest) == digest, f"seed {seed}: {key} re-cut"
            # Contiguous: every seq below next_seq is spooled or was acked.
            seqs = {s for (e, s) in now if e == epoch} | {s for (e, s) in acked if e == epoch}
            assert seqs >= set(range(st.next_seq)), (
                f"seed {seed}: hole in {sorted(set(range(st.next_seq)) - seqs)}"
            )
            assert st.next_seq >= max([s + 1 for (_, s) in run.sealed] or [run.ready_next_seq])
            # Loss: this run's sealed readings are a prefix of what it added; the rest is the unsealed window.
            mine = sorted(i for i, k in owner.items() if first_id <= i < first_id + 10_000_000)
            assert mine == list(range(first_id, first_id + len(mine))), f"seed {seed}: a sealed run has holes"
            lost = [(i, t) for i, t in run.added if i >= first_id + len(mine)]
            if lost:
                age = run.killed_at - min(t for _, t in lost)
                worst_loss_s = max(worst_loss_s, age)
                worst_loss_n = max(worst_loss_n, run.added[-1][0] - (first_id + len(mine)) + 1)
                # A reading waits at most flush_seconds plus one commit; 1 s of slack for a loaded machine.
                assert age <= FLUSH + 1.0, f"seed {seed}: lost a reading {age:.3f} s old"
        total = len(owner)
        print(
            f"kills: {len(seeds)}, readings stored: {total}, keys: {len(history)}, "
            f"worst loss per kill: >= {worst_loss_n} readings, {worst_loss_s * 1000:.0f} ms "
            f"(flush {FLUSH * 1000:.0f} ms)"
        )
        assert total > 0 and len(history) >= len(seeds)

    async def test_crash_right_after_seal_commit_keeps_the_batch(self, tmp_path: Path) -> None:
        """Named crash point: exit right after the seal commit; the batch is there, same digest and readings."""
        path = tmp_path / "spool.sqlite"
        run = await run_child(path, 0, kill_after_lines=None, crash="after_seal", stderr=tmp_path / "err")
        ((key, (digest, n)),) = run.sealed.items()
        spool, _ = await reopen(path)
        head = await spool.peek_oldest()
        assert head is not None and (head.epoch, head.seq, head.digest, head.n_readings) == (*key, digest, n)
        assert spool.stats().next_seq == key[1] + 1
        await spool.close()
        ids = spooled(path)[key][1]
        assert ids == list(range(len(ids))) and len(ids) == n

    async def test_crash_right_after_ack_resends_not_loses(self, tmp_path: Path) -> None:
        """Named crash point: exit right after ack; the lazy delete is lost, so the batch is sent again."""
        path = tmp_path / "spool.sqlite"
        run = await run_child(path, 0, kill_after_lines=None, crash="after_ack", stderr=tmp_path / "err")
        (acked,) = run.acked.keys()
        spool, _ = await reopen(path)
        head = await spool.peek_oldest()
        assert head is not None and (head.epoch, head.seq) == acked
        assert head.digest == run.sealed[acked][0]
        await spool.close()


class TestWriteFailure:
    async def test_file_size_limit_degrades_then_recovers(self, tmp_path: Path) -> None:
        """
        A real write failure (RLIMIT_FSIZE → EFBIG on the WAL): the spool sets its degraded flag, keeps
        readings in RAM, retries on its timer, and after the limit is lifted seals them all.
        """
        path = tmp_path / "spool.sqlite"
        run = await run_child(path, 0, kill_after_lines=None, crash="disk_full", stderr=tmp_path / "err")
        flags = [int(p[1]) for p in run.other if p[0] == "d"]
        assert 1 in flags, f"the fault never fired: {run.other[:5]}"
        assert flags[-1] == 0 and ["uncap"] in run.other, run.other
        closed = next(p for p in run.other if p[0] == "closed")
        assert closed == ["closed", "0"]  # nothing dropped from RAM
        now = spooled(path)
        ids = sorted(
            [i for _, ids, _ in now.values() for i in ids]
            + [i for key, ids in run.acked.items() if key not in now for i in ids]
        )
        assert ids == list(range(len(ids)))  # nothing lost, nothing twice
        assert len(ids) > run.added[-1][0]  # clean close sealed everything added


# ---------------------------------------------------------------------------- damaged files

N_BATCHES = 40


async def build(path: Path, *, crash_image: Path | None = None) -> tuple[str, int]:
    """A spool with N_BATCHES batches of 30 readings. With crash_image, copy the files while still open."""
    clock = VirtualClock()
    spool = await Spool.open(path, clock=clock, max_bytes=64 << 20, flush_seconds=5.0)
    rng = random.Random(5)
    for k in range(N_BATCHES):
        for i in range(30):
            spool.add(wire_reading(30 * k + i, rng))
        await spool.seal(boot="b", offset_db=0.0)
    epoch = spool.stats().epoch
    if crash_image is not None:
        # Every commit has returned (and was fsync'd): copying now is what a power cut would leave.
        await asyncio.to_thread(_copy_files, path, crash_image)
    await spool.close()
    return epoch, N_BATCHES


def _copy_files(path: Path, dest: Path) -> None:
    dest.mkdir(exist_ok=True)
    for p in path.parent.glob(path.name + "*"):
        shutil.copy(p, dest / p.name)


def wire_reading(i: int, rng: random.Random):
    from listenpost.core.records import Reading

    return Reading(f"lpx:{i:08x}", (1000 + i) * 1_000_000, round(rng.uniform(-90, -40), 1))


def flip(p: Path, offset: int, n: int = 16) -> None:
    data = bytearray(p.read_bytes())
    for j in range(offset, min(offset + n, len(data))):
        data[j] ^= 0xFF
    p.write_bytes(bytes(data))


def body_offset(path: Path, seq: int) -> int:
    """Where batch ``seq``'s gzip body sits in the database file (the bytes are unique)."""
    with contextlib.closing(sqlite3.connect(path)) as c:
        (body,) = c.execute("SELECT body FROM batches WHERE seq=?", (seq,)).fetchone()
    off = path.read_bytes().find(body[:64])
    assert off > 0
    return off + 20


def leaf_page_offset(path: Path) -> int:
    """Byte offset of a table leaf page in the middle of the batches table."""
    with contextlib.closing(sqlite3.connect(path)) as c:
        page_size = c.execute("PRAGMA page_size").fetchone()[0]
        # dbstat is not always compiled in; the body offset tells us a page that holds batch rows.
    return (body_offset(path, N_BATCHES // 2) // page_size) * page_size


@dataclass(frozen=True)
class Case:
    name: str
    expect: str
    """"all": every batch recovered · "prefix": a prefix of the commits recovered, no set-aside ·
    "aside": set aside, new epoch, the loss reported · "aside_partial": set aside, readable batches kept
    under their old keys, the rest covered by a spool_corrupt gap record · "row": one bad row replaced
    by a gap record, no set-aside."""


CASES = [
    Case("clean", "all"),
    Case("wal_truncated_to_header", "prefix"),
    Case("wal_truncated_mid_frame", "prefix"),
    Case("wal_truncated_last_byte", "prefix"),
    Case("wal_bytes_flipped", "prefix"),
    Case("shm_deleted", "all"),
    Case("db_zero_length", "aside"),
    Case("db_truncated_half", "aside"),  # the schema names pages past the end: nothing readable
    Case("db_header_flipped", "aside"),
    Case("db_leaf_page_garbage", "aside_partial"),
    Case("db_body_bytes_flipped", "row"),
    Case("garbage_file", "aside"),
    Case("directory", "aside"),
]


async def damage(case: str, tmp: Path) -> tuple[Path, str]:
    """Build a spool, damage it as ``case`` says; return the spool path and its epoch."""
    path = tmp / "spool" / "spool.sqlite"
    if case.startswith(("wal_", "shm_")):
        src = tmp / "src" / "spool.sqlite"
        epoch, _ = await build(src, crash_image=path.parent)
    else:
        epoch, _ = await build(path)
    await asyncio.to_thread(_mutate, case, path)
    return path, epoch


def _mutate(case: str, path: Path) -> None:
    wal = Path(str(path) + "-wal")
    if case.startswith("wal_"):
        assert wal.stat().st_size > 32
    match case:
        case "wal_truncated_to_header":
            os.truncate(wal, 32)
        case "wal_truncated_mid_frame":
            os.truncate(wal, wal.stat().st_size // 2 + 100)
        case "wal_truncated_last_byte":
            os.truncate(wal, wal.stat().st_size - 1)
        case "wal_bytes_flipped":
            flip(wal, wal.stat().st_size * 2 // 3)
        case "shm_deleted":
            Path(str(path) + "-shm").unlink()
        case "db_zero_length":
            os.truncate(path, 0)
        case "db_truncated_half":
            os.truncate(path, path.stat().st_size // 2)
        case "db_header_flipped":
            flip(path, 0, 16)
        case "db_leaf_page_garbage":
            off = leaf_page_offset(path)
            data = bytearray(path.read_bytes())
            data[off : off + 4096] = random.Random(1).randbytes(4096)
            path.write_bytes(bytes(data))
        case "db_body_bytes_flipped":
            flip(path, body_offset(path, 7), 4)
        case "garbage_file":
            path.unlink()
            path.write_bytes(random.Random(2).randbytes(50_000))
        case "directory":
            path.unlink()
            path.mkdir()
            (path / "stray").write_text("x")
        case "clean":
            pass
        case _:
            raise AssertionError(f"unknown case {case!r}")


@pytest.mark.parametrize("case", CASES, ids=[c.name for c in CASES])
async def test_damaged_spool(case: Case, tmp_path: Path) -> None:
    """Open never raises on a damaged spool: it recovers, or sets the file aside and reports the loss."""
    path, old_epoch = await damage(case.name, tmp_path)
    clock = VirtualClock()
    spool = await Spool.open(path, clock=clock, max_bytes=64 << 20, flush_seconds=5.0)
    st = spool.stats()
    assert not st.degraded
    got = []
    while (b := await spool.peek_oldest()) is not None:
        got.append(b)
        await spool.ack(b.epoch, b.seq)
    data = [b for b in got if json.loads(b.content)["gap"] is None]
    gaps = [b for b in got if json.loads(b.content)["gap"] is not None]
    for b in got:
        assert b.digest == wire.digest(b.content)
        wire.decode_content(json.loads(b.content))
    aside = path.with_name(path.name + ".corrupt")
    old_seqs = [b.seq for b in data if b.epoch == old_epoch]
    if case.expect in ("all", "prefix", "row"):
        assert (st.epoch, st.corrupt_set_aside) == (old_epoch, 0) and not aside.exists()
        if case.expect == "all":
            assert old_seqs == list(range(N_BATCHES)) and not gaps and st.next_seq == N_BATCHES
        elif case.expect == "prefix":
            # WAL frames after the damage are ignored (their checksums fail); earlier commits stand,
            # and next_seq agrees with what survived, so no key is reused against this file.
            assert old_seqs == list(range(len(old_seqs))) and st.next_seq == len(old_seqs) and not gaps
        else:
            assert old_seqs == [s for s in range(N_BATCHES) if s != 7]
            (g,) = gaps
            assert json.loads(g.content)["gap"] == {
                "epoch": old_epoch,
                "first_seq": 7,
                "last_seq": 7,
                "readings": 30,
                "reason": "spool_corrupt",
            }
            assert spool.stats().dropped_batches == 1
    else:
        assert st.epoch != old_epoch and st.corrupt_set_aside == 1 and aside.exists()
        for g in gaps:
            assert g.epoch == st.epoch and json.loads(g.content)["gap"]["reason"] == "spool_corrupt"
            assert json.loads(g.content)["gap"]["epoch"] == old_epoch
        salvaged = {b.seq for b in data}
        assert all(b.epoch == old_epoch for b in data)
        if case.expect == "aside_partial":
            assert salvaged, "nothing salvaged"
            covered = {
                s
                for g in gaps
                for s in range(
                    json.loads(g.content)["gap"]["first_seq"], json.loads(g.content)["gap"]["last_seq"] + 1
                )
            }
            assert salvaged | covered == set(range(N_BATCHES)) and not salvaged & covered
        else:
            assert not data
    # Whatever happened, the spool works now and keeps working across a reopen.
    spool.add(wire_reading(99_999, random.Random(0)))
    b = await spool.seal(boot="b", offset_db=0.0)
    assert b is not None and b.epoch == spool.stats().epoch
    await spool.close()
    spool = await Spool.open(path, clock=clock, max_bytes=64 << 20, flush_seconds=5.0)
    assert spool.stats().corrupt_set_aside == st.corrupt_set_aside and (await spool.peek_oldest()) == b
    await spool.close()
    print(
        f"{case.name}: epoch {'kept' if st.epoch == old_epoch else 'new'}, batches {len(data)}, "
        f"gap records {len(gaps)}, set aside {st.corrupt_set_aside}"
    )


def _plant_garbage(path: Path) -> None:
    path.write_bytes(b"not a database at all" * 100)
    for suffix in ("-wal", "-shm"):
        Path(str(path) + suffix).unlink(missing_ok=True)


async def test_only_one_set_aside_file_is_kept(tmp_path: Path) -> None:
    """A second corruption replaces the first set-aside file rather than piling them up."""
    path = tmp_path / "spool.sqlite"
    for _ in (1, 2):
        await asyncio.to_thread(_plant_garbage, path)
        spool = await Spool.open(path, clock=VirtualClock(), max_bytes=1 << 20, flush_seconds=5.0)
        assert spool.stats().corrupt_set_aside == 1 and not spool.stats().degraded
        await spool.close()
    names = await asyncio.to_thread(lambda: sorted(p.name for p in tmp_path.iterdir()))
    assert names == ["spool.sqlite", "spool.sqlite.corrupt"]
