"""
A board in miniature for the spool's kill tests: adds readings with unique ids, seals and acks
continuously on the real clock, and reports each step on stdout only after it has returned.

    python spool_child.py SPOOL_PATH FIRST_ID FLUSH_SECONDS MAX_BYTES

Reading ``i`` has tag ``lpx:<i as 8 hex>``, so every reading can be traced. Lines (flushed):

    ready <epoch> <next_seq>
    a <id> <board monotonic seconds>       every 100th reading, after add()
    s <epoch> <seq> <digest> <n>           after a seal's commit returned
    k <epoch> <seq> <first id> <last id> <n> after ack() returned (the uplink's part, every other seal)
    d <degraded 0|1> <readings pending>    after a seal attempt, in the disk-full mode

``LISTENPOST_SPOOL_CHILD_CRASH`` picks a named crash point: ``after_seal`` (exit right after the
first seal commit), ``after_ack`` (exit right after the first ack), ``disk_full`` (cap file sizes with
RLIMIT_FSIZE after the first seal, then lift the cap again, and exit when all is sealed).
"""

from __future__ import annotations

import asyncio
import json
import os
import resource
import signal
import sys
from pathlib import Path

from listenpost.agent.spool import Spool
from listenpost.core.clock import SystemClock
from listenpost.core.logs import configure
from listenpost.core.records import Reading

RATE_PER_S = 5000
"""Readings added per second (bursts of 50 every 10 ms)."""


def say(*parts: object) -> None:
    sys.stdout.write(" ".join(str(p) for p in parts) + "\n")
    sys.stdout.flush()


async def main(path: Path, first_id: int, flush: float, max_bytes: int) -> None:
    crash = os.environ.get("LISTENPOST_SPOOL_CHILD_CRASH", "")
    clock = SystemClock()
    spool = await Spool.open(
        path, clock=clock, max_bytes=max_bytes, flush_seconds=flush, max_batch_readings=1_000_000
    )
    st = spool.stats()
    say("ready", st.epoch, st.next_seq)
    stop = asyncio.Event()

    async def adder() -> None:
        i = first_id
        while not stop.is_set():
            for _ in range(50):
                spool.add(Reading(f"lpx:{i:08x}", clock.monotonic_ns(), -60.0))
                if i % 100 == 0:
                    say("a", i, f"{clock.monotonic():.6f}")
                i += 1
            await clock.sleep(50 / RATE_PER_S)

    sealed = [0]
    """Seals that committed (read by the disk-full driver)."""

    async def sealer() -> None:
        seals = 0
        while not stop.is_set():
            await clock.sleep(flush)
            b = await spool.seal(boot=clock.boot_id, offset_db=0.0)
            if crash == "disk_full":
                say("d", int(spool.stats().degraded), spool.stats().readings_pending)
            if b is None:
                continue
            say("s", b.epoch, b.seq, b.digest, b.n_readings)
            seals += 1
            sealed[0] = seals
            if crash == "after_seal":
                os._exit(0)
            if crash == "disk_full":
                await disk_full_step(seals)
            if seals % 2 == 0:
                head = await spool.peek_oldest()
                if head is not None:
                    await spool.ack(head.epoch, head.seq)
                    ids = [int(t.split(":")[1], 16) for t in json.loads(head.content)["readings"]["tags"]]
                    say("k", head.epoch, head.seq, min(ids, default=-1), max(ids, default=-1), len(ids))
                    if crash == "after_ack":
                        os._exit(0)

    async def disk_full_step(seals: int) -> None:
        if seals == 1:
            # Every file this process writes may grow only a little more: the next growth of the
            # spool's WAL fails with EFBIG (SIGXFSZ ignored so the write returns the error).
            signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
            biggest = max(p.stat().st_size for p in path.parent.glob(path.name + "*"))
            resource.setrlimit(resource.RLIMIT_FSIZE, (biggest + 4096, resource.RLIM_INFINITY))
            say("cap", biggest + 4096)

    async def disk_full_driver() -> None:
        # Lift the cap once the spool has noticed; then stop after one more successful seal.
        while not spool.stats().degraded:
            await clock.sleep(flush / 2)
        await clock.sleep(flush * 3)
        before = sealed[0]
        resource.setrlimit(resource.RLIMIT_FSIZE, (resource.RLIM_INFINITY, resource.RLIM_INFINITY))
        say("uncap")
        # Under the cap the spool may recover and fail again (a checkpoint frees room in the WAL), so
        # "not degraded now" proves nothing: wait for a seal that committed after the cap was lifted.
        while spool.stats().degraded or sealed[0] == before:
            await clock.sleep(flush / 2)
        stop.set()

    tasks = [asyncio.create_task(adder()), asyncio.create_task(sealer())]
    if crash == "disk_full":
        await disk_full_driver()
        await asyncio.gather(*tasks)  # both loops end at their next turn; no step is cut short
        await spool.close()
        say("closed", spool.stats().dropped_readings)
        return
    await asyncio.gather(*tasks)


if __name__ == "__main__":
    configure("json", "warning", stream=sys.stderr)
    asyncio.run(main(Path(sys.argv[1]), int(sys.argv[2]), float(sys.argv[3]), int(sys.argv[4])))
