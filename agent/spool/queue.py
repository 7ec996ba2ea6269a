"""
The event-loop side of the spool: the in-memory intake, the sealer, and the queue API the uplink
and the service call. Every disk operation runs on one worker thread (`listenpost.agent.spool.disk.Disk`).
"""

from __future__ import annotations

import asyncio
import concurrent.futures
from collections import deque
from collections.abc import Awaitable, Callable, Sequence
from pathlib import Path
from typing import Any, TypeVar

import structlog

from listenpost.agent.spool.disk import Disk
from listenpost.agent.spool.sqlfile import Degraded
from listenpost.agent.spool.values import (
    RETRY_MAX_SECONDS,
    GapReason,
    Interval,
    SealedBatch,
    SpoolStats,
    new_epoch,
    seal_content,
)
from listenpost.core.clock import Clock
from listenpost.core.errors import SpoolError
from listenpost.core.records import Reading
from listenpost.core.wire import encode_content

log = structlog.get_logger("listenpost.agent.spool")

T = TypeVar("T")


class Spool:
    """
    The durable queue between the pipeline and the uplink.

    Example::

        spool = await Spool.open(state / "spool.sqlite", clock=clock, max_bytes=64 << 20, flush_seconds=5)
        sealer = asyncio.create_task(spool.run_sealer(lambda: clock.boot_id, lambda: offset_db))
        spool.add(reading)                       # from the pipeline; memory only
        batch = await spool.peek_oldest()        # from the uplink
        await spool.ack(batch.epoch, batch.seq)
    """

    def __init__(
        self,
        path: Path,
        *,
        clock: Clock,
        max_bytes: int,
        flush_seconds: float,
        max_batch_readings: int,
        max_pending_readings: int,
    ) -> None:
        self.path = path
        self._clock = clock
        self.max_bytes = max_bytes
        self.flush_seconds = flush_seconds
        self.max_batch_readings = max_batch_readings
        self.max_pending_readings = max_pending_readings
        self._disk = Disk(path, max_bytes, clock.boot_id)
        self._executor = concurrent.futures.ThreadPoolExecutor(max_workers=1, thread_name_prefix="spool")
        self._pending: deque[Reading] = deque()
        self._first_add_mono: float | None = None
        self._acks: set[tuple[str, int]] = set()
        # While the storage fails, pending readings are sealed into memory batches of their own epoch
        # (random, so their keys never collide with the file's) that the uplink sends from RAM; once
        # the storage works again they are written to the file under those keys.
        self._mem: deque[SealedBatch] = deque()
        self._mem_gaps: dict[tuple[str, int], dict[str, Any]] = {}
        """Gap objects of the memory batches that are gap records."""
        self._mem_readings = 0
        self._mem_epoch: str | None = None
        self._mem_next_seq = 0
        self._handed_out: tuple[str, int] | None = None
        """The memory batch `peek_oldest` gave last (maybe in flight: never dropped for space)."""
        self._carrying: set[tuple[str, int]] = set()
        """Memory batches a commit in flight is writing to the file (not dropped meanwhile)."""
        # Drops from memory (oldest first, past max_pending_readings): exact counts, reported by the next
        # gap record and added to the file's counters by the next successful seal.
        self._lost_readings = 0
        """Dropped readings no gap record names yet."""
        self._lost_first_seq: int | None = None
        """Lowest memory seq among the dropped memory batches no gap record names yet."""
        self._uncounted_readings = 0
        self._uncounted_batches = 0
        self._front_dropped = 0
        self._ram_dropped_total = 0
        self.lost_at_close = 0
        """Readings neither in the file nor named by a gap record in it when `close` returned."""
        self._snap = self._disk.snapshot()
        self._seal_lock = asyncio.Lock()
        self._inflight: set[asyncio.Task[Any]] = set()
        self._retry_at = 0.0
        self._retry_interval = flush_seconds
        self._last_offset_db = 0.0
        self._last_boot = clock.boot_id
        self._closed = False

    @classmethod
    async def open(
        cls,
        path: Path,
        *,
        clock: Clock,
        max_bytes: int,
        flush_seconds: float,
        max_batch_readings: int = 5000,
        max_pending_readings: int = 50_000,
    ) -> Spool:
        """
        Open the spool at ``path`` (creating it and its directory if missing).

        A corrupt file is set aside and replaced, never raised. If the storage cannot be used at all
        (disk full, I/O error, read-only card) the spool opens *degraded*: readings wait in RAM (at most
        ``max_pending_readings``) and opening is retried on a timer.

        Args:
            path: the SQLite file.
            clock: the injected clock (seal times, ages, retry timer).
            max_bytes: bound of `SpoolStats.bytes`; the oldest batches are dropped past it.
            flush_seconds: readings wait in memory at most this long, seconds.
            max_batch_readings: readings per sealed batch; more pending readings make several batches.
            max_pending_readings: hard cap of the RAM buffer (oldest readings dropped and counted past it).

        Raises:
            ValueError: a bound is not positive (the message names it).
        """
        for name, value in (
            ("max_bytes", max_bytes),
            ("flush_seconds", flush_seconds),
            ("max_batch_readings", max_batch_readings),
            ("max_pending_readings", max_pending_readings),
        ):
            if not isinstance(value, int | float) or isinstance(value, bool) or not value > 0:
                raise ValueError(f"{name}: must be > 0, got {value!r}")
        spool = cls(
            Path(path),
            clock=clock,
            max_bytes=int(max_bytes),
            flush_seconds=float(flush_seconds),
            max_batch_readings=int(max_batch_readings),
            max_pending_readings=int(max_pending_readings),
        )
        await spool._call(spool._disk.open, clock.monotonic(), clock.time())
        return spool

    # ---------------------------------------------------------------- intake

    def add(self, reading: Reading) -> None:
        """Queue one reading in memory (see `add_many`)."""
        self.add_many((reading,))

    def add_many(self, readings: Sequence[Reading]) -> None:
        """
        Queue readings in memory, in order (no I/O). Past the memory bound the oldest readings go: a
        whole memory batch if there is one, else the oldest pending reading; every drop is counted.
        """
        if not readings:
            return
        if self._first_add_mono is None:
            self._first_add_mono = self._clock.monotonic()
        self._pending.extend(readings)
        while len(self._pending) + self._mem_readings > self.max_pending_readings:
            self._drop_oldest()

    def _drop_oldest(self) -> None:
        victim = next(
            (
                b
                for b in self._mem
                if b.n_readings
                and (b.epoch, b.seq) != self._handed_out
                and (b.epoch, b.seq) not in self._carrying
            ),
            None,
        )
        if victim is not None:
            self._mem.remove(victim)
            self._mem_readings -= victim.n_readings
            n = victim.n_readings
            first = self._lost_first_seq
            self._lost_first_seq = victim.seq if first is None else min(first, victim.seq)
            self._uncounted_batches += 1
        else:
            self._pending.popleft()
            self._front_dropped += 1
            n = 1
        self._lost_readings += n
        self._uncounted_readings += n
        before = self._ram_dropped_total
        self._ram_dropped_total += n
        if before == 0 or before // 10_000 != self._ram_dropped_total // 10_000:
            log.error(
                "spool_ram_buffer_full",
                dropped_readings=self._ram_dropped_total,
                cap=self.max_pending_readings,
                degraded=self._snap.degraded,
            )

    def due(self) -> bool:
        """True when pending readings have waited ``flush_seconds`` or more."""
        return (
            self._first_add_mono is not None
            and self._clock.monotonic() - self._first_add_mono >= self.flush_seconds
        )

    async def seal(self, *, boot: str, offset_db: float) -> SealedBatch | None:
        """
        Seal every pending reading (in batches of at most ``max_batch_readings``) in one durable commit.

        Pending acks are applied in the same commit, and batches sealed in memory while the storage
        failed are written first, under their keys. Returns the last batch made durable, or ``None``
        when nothing was pending or the storage is failing (then the readings are sealed into memory
        batches, bounded by ``max_pending_readings``, that the uplink can send from RAM).
        """
        self._check_open()
        return await self._shielded(self._serial(self._seal, boot, offset_db))

    async def _seal(self, boot: str, offset_db: float) -> SealedBatch | None:
        self._last_offset_db = offset_db
        self._last_boot = boot
        now = self._clock.monotonic()
        if self._lost_readings:
            self._seal_gap_in_memory(boot, offset_db, now)
        if self._snap.degraded and now < self._retry_at:
            self._seal_in_memory(boot, offset_db, now)
            return None
        if not self._pending and not self._acks and not self._mem and not self._snap.degraded:
            return None
        readings = list(self._pending)
        front_dropped = self._front_dropped
        chunks = [
            readings[i : i + self.max_batch_readings]
            for i in range(0, len(readings), self.max_batch_readings)
        ]
        acks = set(self._acks)
        carried = [(b, self._mem_gaps.get((b.epoch, b.seq))) for b in self._mem]
        self._carrying = {(b.epoch, b.seq) for b, _ in carried}
        dropped_readings, dropped_batches = self._uncounted_readings, self._uncounted_batches
        try:
            if chunks or carried or dropped_readings:
                sealed = await self._call(
                    self._disk.seal,
                    chunks,
                    boot,
                    offset_db,
                    acks,
                    dropped_readings,
                    now,
                    self._clock.time(),
                    carried,
                    dropped_batches,
                )
            else:
                sealed = []
                await self._call(self._disk.flush_acks, acks, now, self._clock.time())
        except Degraded:
            for key in self._carrying & self._acks:  # acked while the failed commit ran
                self._acks.discard(key)
                self._forget_mem(key)
            self._seal_in_memory(boot, offset_db, now)
            return None
        finally:
            self._carrying = set()
        # Readings added while the commit ran stay pending; only the sealed prefix leaves. Readings the
        # memory bound pushed out meanwhile were in the sealed snapshot, so they are not lost after all.
        pushed_out = min(self._front_dropped - front_dropped, len(readings))
        for _ in range(len(readings) - pushed_out):
            self._pending.popleft()
        self._lost_readings -= pushed_out
        self._ram_dropped_total -= pushed_out
        self._uncounted_readings -= dropped_readings + pushed_out
        self._uncounted_batches -= dropped_batches
        self._first_add_mono = now if self._pending else None
        self._acks -= acks
        for b, _ in carried:  # now in the file (one acked meanwhile is in ``_acks``: deleted next time)
            self._forget_mem((b.epoch, b.seq))
        if not self._mem and not self._lost_readings:
            self._mem_epoch = None  # the next failing spell starts a fresh memory epoch
        if carried:
            log.info("spool_memory_batches_written", batches=len(carried), path=str(self.path))
        for b in sealed:
            log.debug("spool_batch_sealed", epoch=b.epoch, seq=b.seq, readings=b.n_readings)
        if sealed:
            return sealed[-1]
        return carried[-1][0] if carried else None  # memory batches made durable count as sealed now

    def _next_mem_key(self) -> tuple[str, int]:
        if self._mem_epoch is None:
            self._mem_epoch, self._mem_next_seq = new_epoch(), 0
            log.warning("spool_memory_epoch", epoch=self._mem_epoch, path=str(self.path))
        seq = self._mem_next_seq
        self._mem_next_seq += 1
        return self._mem_epoch, seq

    def _seal_in_memory(self, boot: str, offset_db: float, now: float) -> None:
        """The storage fails: cut the pending readings into memory batches the uplink can send."""
        while self._pending:
            chunk = [self._pending.popleft() for _ in range(min(self.max_batch_readings, len(self._pending)))]
            raw, _, dig = seal_content(encode_content(chunk, boot=boot, offset_db=offset_db))
            epoch, seq = self._next_mem_key()
            self._mem.append(SealedBatch(epoch, seq, dig, raw, len(chunk), now))
            self._mem_readings += len(chunk)
        self._first_add_mono = None

    def _seal_gap_in_memory(self, boot: str, offset_db: float, now: float) -> None:
        """
        One gap record (reason ``spool_full``) for the readings dropped from memory since the last one.

        It is sealed in the memory epoch, whose seqs it names (the collector applies a gap's range to
        the envelope's epoch); its range ends at its own seq, so readings dropped before they had a seq
        are named too. An older gap record still waiting in memory is folded in, so they never pile up.
        """
        epoch, seq = self._next_mem_key()
        first, readings = min(seq, self._lost_first_seq if self._lost_first_seq is not None else seq), 0
        for key in [k for k in self._mem_gaps if k != self._handed_out and k not in self._carrying]:
            old = self._forget_mem(key)
            first, readings = min(first, old["first_seq"]), readings + old["readings"]
        readings += self._lost_readings
        gap = self._disk._gap_object(Interval(epoch, first, seq, readings), GapReason.SPOOL_FULL)
        raw, _, dig = seal_content(encode_content([], boot=boot, offset_db=offset_db, gap=gap))
        self._mem.append(SealedBatch(epoch, seq, dig, raw, 0, now))
        self._mem_gaps[(epoch, seq)] = gap
        log.warning("spool_memory_dropped", readings=self._lost_readings, gap_seq=seq, epoch=epoch)
        self._lost_readings, self._lost_first_seq = 0, None

    def _forget_mem(self, key: tuple[str, int]) -> dict[str, Any]:
        """Take one batch out of the memory queue; returns its gap object ({} for readings)."""
        for b in self._mem:
            if (b.epoch, b.seq) == key:
                self._mem.remove(b)
                self._mem_readings -= b.n_readings
                break
        if self._handed_out == key:
            self._handed_out = None
        return self._mem_gaps.pop(key, {})

    async def run_sealer(self, boot_fn: Callable[[], str], offset_fn: Callable[[], float]) -> None:
        """Seal every ``flush_seconds`` until cancelled. A seal already committing finishes first."""
        while True:
            await self._clock.sleep(self.flush_seconds)
            try:
                await self.seal(boot=boot_fn(), offset_db=offset_fn())
            except SpoolError:
                return
            except Exception:  # the scanner must keep running; the log carries the bug
                log.exception("spool_seal_failed")

    # ---------------------------------------------------------------- uplink side

    async def peek_oldest(self) -> SealedBatch | None:
        """
        The oldest batch not yet acked or dead-lettered: from the file (one at a time), else from the
        memory queue. While the storage fails, pending readings are sealed into memory at once, so
        readings held in memory are never reported as "nothing to send".
        """
        self._check_open()
        if self._snap.degraded and not self._mem and self._pending:
            await self._shielded(self._serial(self._seal_now_in_memory))
        snap = self._snap
        # Reading works on a full disk; a failing file is retried no sooner than its timer. A healthy
        # file holding no batch (its row count is mirrored here after every disk call) is not asked:
        # the uplink polls an empty spool every second, and the hop to the disk thread and back costs
        # about as much CPU as a second of the pipeline at 200 adverts/s.
        if (not snap.degraded and snap.batches) or (
            snap.degraded and not self._mem and self._clock.monotonic() >= self._retry_at
        ):
            try:
                found = await self._shielded(
                    self._call(
                        self._disk.peek,
                        set(self._acks),
                        self._last_offset_db,
                        self._clock.monotonic(),
                        self._clock.time(),
                    )
                )
            except Degraded:
                found = None
            if found is not None:
                return found
        if self._mem:
            head = self._mem[0]
            self._handed_out = (head.epoch, head.seq)
            return head
        return None

    async def _seal_now_in_memory(self) -> None:
        if self._lost_readings:
            self._seal_gap_in_memory(self._last_boot, self._last_offset_db, self._clock.monotonic())
        self._seal_in_memory(self._last_boot, self._last_offset_db, self._clock.monotonic())

    async def ack(self, epoch: str, seq: int) -> None:
        """
        The collector holds this batch: it is never returned by `peek_oldest` again.

        The delete is committed with the next seal (or within ``flush_seconds``); after a crash before
        that, the batch is sent once more and the collector answers ``duplicate``. A memory batch just
        leaves memory (and the file, if a commit in flight is writing it there).
        """
        self._check_open()
        key = (epoch, seq)
        if epoch == self._mem_epoch and key not in self._carrying:
            self._forget_mem(key)
            return
        self._acks.add(key)
        if len(self._acks) >= 1000:  # a fast drain with no new readings: do not let the set grow
            await self._shielded(self._serial(self._flush_acks))

    async def _flush_acks(self) -> None:
        acks = set(self._acks)
        try:
            await self._call(self._disk.flush_acks, acks, self._clock.monotonic(), self._clock.time())
        except Degraded:
            return
        self._acks -= acks

    async def dead_letter(self, epoch: str, seq: int, status: int, reason: str) -> None:
        """
        Move a refused batch to the dead-letter table (newest `DEAD_LETTER_KEEP` kept, all counted) and
        seal a gap record (reason ``dead_letter``) so the collector can explain the missing seq.
        """
        self._check_open()
        if epoch == self._mem_epoch and (epoch, seq) not in self._carrying:
            await self._shielded(self._serial(self._dead_letter_in_memory, epoch, seq, status, reason))
            return
        try:
            found = await self._shielded(
                self._serial(
                    self._call,
                    self._disk.dead_letter,
                    epoch,
                    seq,
                    status,
                    reason,
                    self._last_offset_db,
                    self._clock.monotonic(),
                    self._clock.time(),
                )
            )
        except Degraded:
            return  # still spooled: it will be sent, refused and moved aside again later
        if found:
            log.warning("spool_dead_letter", epoch=epoch, seq=seq, status=status, reason=reason)
        else:
            log.info("spool_dead_letter_missing", epoch=epoch, seq=seq, status=status)

    async def _dead_letter_in_memory(self, epoch: str, seq: int, status: int, reason: str) -> None:
        """A refused memory batch cannot be kept aside (no file): it goes, and a gap record says so."""
        batch = next((b for b in self._mem if (b.epoch, b.seq) == (epoch, seq)), None)
        if batch is None:
            return
        was_gap = bool(self._forget_mem((epoch, seq)))
        log.error("spool_dead_letter_dropped", epoch=epoch, seq=seq, status=status, reason=reason)
        if was_gap:
            return  # a refused gap record gets no gap record of its own (no loop)
        self._uncounted_readings += batch.n_readings
        self._uncounted_batches += 1
        gap_epoch, gap_seq = self._next_mem_key()
        gap = self._disk._gap_object(
            Interval(epoch, seq, seq, batch.n_readings), GapReason.DEAD_LETTER, status
        )
        content = encode_content([], boot=self._last_boot, offset_db=self._last_offset_db, gap=gap)
        raw, _, dig = seal_content(content)
        self._mem.append(SealedBatch(gap_epoch, gap_seq, dig, raw, 0, self._clock.monotonic()))
        self._mem_gaps[(gap_epoch, gap_seq)] = gap

    async def new_epoch(self, reason: str) -> str:
        """
        Start a fresh epoch (seq restarts at 0). Batches already sealed keep their old key.

        Raises:
            SpoolError: the storage is failing, so the new epoch could not be made durable.
        """
        self._check_open()
        try:
            epoch = await self._shielded(
                self._serial(self._call, self._disk.start_epoch, self._clock.monotonic(), self._clock.time())
            )
        except Degraded as e:
            raise SpoolError(f"{self.path}: cannot start a new epoch: {e}") from e
        log.warning("spool_epoch_created", epoch=epoch, reason=reason)
        return epoch

    def stats(self) -> SpoolStats:
        """A snapshot of the spool's figures (no I/O)."""
        s = self._snap
        age = None
        if s.oldest is not None:
            if s.oldest.boot == self._clock.boot_id:
                age = max(0.0, self._clock.monotonic() - s.oldest.mono)
            else:  # sealed in an earlier boot: board monotonic time restarted, the wall clock did not
                age = max(0.0, self._clock.time() - s.oldest.wall)
        return SpoolStats(
            # acked batches stay on disk until the next seal commits their removal: not a backlog
            batches=max(0, s.batches - len(self._acks)),
            bytes=s.bytes,
            readings_pending=len(self._pending) + self._mem_readings,
            oldest_age_s=age,
            next_seq=s.next_seq,
            epoch=s.epoch,
            dropped_batches=s.counters["dropped_batches"] + self._uncounted_batches,
            dropped_readings=s.counters["dropped_readings"] + self._uncounted_readings,
            dead_letters=s.counters["dead_letters"],
            corrupt_set_aside=s.counters["corrupt_set_aside"],
            degraded=s.degraded,
            memory_batches=len(self._mem),
        )

    async def idle(self) -> None:
        """
        Return once no spool operation is running on the worker thread.

        A commit takes real time while a virtual clock stands still only if its driver waits here
        before moving it; the sealer's next period starts when the seal returns.
        """
        while self._inflight:
            await asyncio.wait(set(self._inflight))

    async def close(self) -> None:
        """Seal what is pending (a clean shutdown loses nothing), then close the file and the worker."""
        if self._closed:
            return
        if self._inflight:
            await asyncio.gather(*self._inflight, return_exceptions=True)
        async with self._seal_lock:
            self._retry_at = 0.0  # one last attempt even if a retry is not due yet
            await self._seal(self._last_boot, self._last_offset_db)
            self._closed = True
            await self._run(self._disk.close)
        self._executor.shutdown(wait=True)
        # What is still in memory now is lost: readings, and drops whose gap record never reached the file.
        held = len(self._pending) + self._mem_readings
        unreported = self._lost_readings + sum(g["readings"] for g in self._mem_gaps.values())
        self.lost_at_close = held + unreported
        if self.lost_at_close:
            log.error(
                "spool_closed_with_readings_lost",
                readings=self.lost_at_close,
                in_memory=held,
                dropped_unreported=unreported,
                path=str(self.path),
            )

    # ---------------------------------------------------------------- plumbing

    def _check_open(self) -> None:
        if self._closed:
            raise SpoolError(f"{self.path}: spool is closed")

    async def _run(self, fn: Callable[..., T], *args: Any) -> T:
        """Run ``fn`` on the worker thread and mirror the disk state afterwards, failure or not."""
        loop = asyncio.get_running_loop()
        try:
            return await loop.run_in_executor(self._executor, fn, *args)
        finally:
            self._after_disk()

    async def _call(self, fn: Callable[..., T], *args: Any) -> T:
        """`_run`, plus the degraded-mode bookkeeping when the storage failed."""
        try:
            return await self._run(fn, *args)
        except Degraded as e:
            now = self._clock.monotonic()
            self._retry_at = now + self._retry_interval
            log.error(
                "spool_degraded",
                path=str(self.path),
                error=str(e),
                retry_in_s=self._retry_interval,
                readings_pending=len(self._pending) + self._mem_readings,
            )
            self._retry_interval = min(self._retry_interval * 2, RETRY_MAX_SECONDS)
            raise

    def _after_disk(self) -> None:
        was = self._snap.degraded
        self._snap = self._disk.snapshot()
        if was and not self._snap.degraded:
            self._retry_interval = self.flush_seconds
            log.info("spool_recovered", path=str(self.path), epoch=self._snap.epoch)

    async def _serial(self, fn: Callable[..., Awaitable[T]], *args: Any) -> T:
        """Run ``fn`` holding the seal lock: seals, acks flushes, dead letters and epochs never interleave."""
        async with self._seal_lock:
            return await fn(*args)

    async def _shielded(self, coro: Awaitable[T]) -> T:
        """Await ``coro`` so that cancelling the caller does not cut it short (its results get applied)."""
        task = asyncio.ensure_future(coro)
        self._inflight.add(task)
        task.add_done_callback(_forget(self._inflight))
        return await asyncio.shield(task)


def _forget(tasks: set[asyncio.Task[Any]]) -> Callable[[asyncio.Task[Any]], None]:
    def done(t: asyncio.Task[Any]) -> None:
        tasks.discard(t)
        if not t.cancelled():
            t.exception()  # retrieved here so an orphaned failure is not reported as "never retrieved"

    return done
