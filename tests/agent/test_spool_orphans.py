"""
A spool file deleted while its ``-wal``/``-shm`` stayed behind (a technician "resetting" a board whose
agent was not stopped cleanly): the journal files are moved aside or removed, the loss is counted,
and a fresh spool opens sound.
"""

from __future__ import annotations

from pathlib import Path

from structlog.testing import capture_logs

from listenpost.agent.spool import Spool
from listenpost.core.clock import VirtualClock
from listenpost.core.records import Reading


def read(path: Path, suffix: str = "") -> bytes:
    return Path(str(path) + suffix).read_bytes()


def put_back_and_delete_db(path: Path, kept: dict[str, bytes]) -> None:
    """What the unclean stop left, with the database file itself deleted."""
    for sfx, data in kept.items():
        Path(str(path) + sfx).write_bytes(data)
    path.unlink()


def names(directory: Path) -> list[str]:
    return sorted(p.name for p in directory.iterdir())


def make_dir_with_junk(d: Path) -> None:
    d.mkdir()
    (d / "junk").write_text("x")


async def open_spool(path: Path, clock: VirtualClock) -> Spool:
    return await Spool.open(path, clock=clock, max_bytes=1 << 20, flush_seconds=5.0)


async def seal_some(spool: Spool, clock: VirtualClock, batches: int, first: int = 0) -> None:
    for k in range(batches):
        for i in range(50):
            spool.add(Reading(f"lpx:{i:08x}", (first + k * 1000 + i) * 1_000_000, -60.0))
        assert await spool.seal(boot=clock.boot_id, offset_db=0.0) is not None


async def leave_orphans(
    path: Path, clock: VirtualClock, *, checkpointed_first: bool, suffixes: tuple[str, ...] = ("-wal", "-shm")
) -> tuple[str, dict[str, bytes]]:
    """
    Make a spool with batches in its WAL, keep its journal files as an unclean stop leaves them,
    then delete only the database file. Returns the old epoch and the left-behind bytes.
    """
    spool = await open_spool(path, clock)
    epoch = spool.stats().epoch
    await seal_some(spool, clock, 20)
    if checkpointed_first:  # the old pages are in the database file; only the last seal is in the WAL
        await spool.close()
        spool = await open_spool(path, clock)
    await seal_some(spool, clock, 1, first=900_000)
    kept = {sfx: read(path, sfx) for sfx in suffixes}  # the worker thread is idle between calls
    await spool.close()  # checkpoints and removes the WAL; put the unclean stop's files back
    put_back_and_delete_db(path, kept)
    return epoch, kept


async def test_a_stale_wal_is_not_replayed_onto_the_fresh_spool(tmp_path: Path, clock: VirtualClock) -> None:
    """Before the fix the orphan WAL was applied to the new file: the old epoch and seq came back."""
    path = tmp_path / "spool.sqlite"
    for checkpointed_first in (False, True):
        old_epoch, kept = await leave_orphans(path, clock, checkpointed_first=checkpointed_first)
        assert kept["-wal"], "the scenario needs a WAL with data in it"
        with capture_logs() as logs:
            spool = await open_spool(path, clock)
        st = spool.stats()
        assert st.epoch != old_epoch and st.next_seq == 0 and st.batches == 0
        assert not st.degraded and st.corrupt_set_aside == 1
        orphan = path.with_name("spool.sqlite.orphan-wal")
        assert read(orphan) == kept["-wal"]  # kept for a technician, byte for byte
        assert "spool.sqlite.orphan-shm" not in names(tmp_path)  # an index, not data: removed
        events = [e for e in logs if e["event"] == "spool_orphans_set_aside"]
        assert len(events) == 1 and events[0]["log_level"] == "error"
        assert events[0]["files"] == {
            "spool.sqlite-wal": len(kept["-wal"]),
            "spool.sqlite-shm": len(kept["-shm"]),
        }
        new_epoch = st.epoch
        # The fresh spool works and reopens sound, the count survives the reopen.
        await seal_some(spool, clock, 2)
        await spool.close()
        spool = await open_spool(path, clock)
        st = spool.stats()
        assert (st.epoch, st.next_seq, st.batches, st.corrupt_set_aside, st.degraded) == (
            new_epoch,
            2,
            2,
            1,
            False,
        )
        await spool.close()
        put_back_and_delete_db(path, {})  # next round starts from nothing (the clean close removed the WAL)
    # One set of orphans is kept: the second round replaced the first.
    assert names(tmp_path) == ["spool.sqlite.orphan-wal"]


async def test_a_lone_shm_is_removed_without_counting_a_loss(tmp_path: Path, clock: VirtualClock) -> None:
    """The -shm is only an index of the WAL: no data is lost with it."""
    path = tmp_path / "spool.sqlite"
    await leave_orphans(path, clock, checkpointed_first=True, suffixes=("-shm",))
    assert names(tmp_path) == ["spool.sqlite-shm"]
    with capture_logs() as logs:
        spool = await open_spool(path, clock)
    st = spool.stats()
    assert (st.corrupt_set_aside, st.degraded, st.batches, st.next_seq) == (0, False, 0, 0)
    assert [e["event"] for e in logs if e["event"].startswith("spool_orphans")] == ["spool_orphans_removed"]
    assert "spool.sqlite.orphan-shm" not in names(tmp_path)
    await spool.close()


async def test_an_empty_wal_and_a_directory_in_the_way_are_cleared(
    tmp_path: Path, clock: VirtualClock
) -> None:
    """Nothing to keep in an empty WAL; a directory named like the -shm does not stop the open."""
    path = tmp_path / "spool.sqlite"
    put_back_and_delete_db(path, {"": b"", "-wal": b""})
    make_dir_with_junk(Path(str(path) + "-shm"))
    spool = await open_spool(path, clock)
    st = spool.stats()
    assert (st.corrupt_set_aside, st.degraded) == (0, False)
    await seal_some(spool, clock, 1)
    await spool.close()
    assert names(tmp_path) == ["spool.sqlite"]
