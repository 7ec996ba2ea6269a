"""
The event-loop side of the spool: the in-memory intake, the sealer, and the queue API the uplink
and the service call. Every disk operation runs on one worker thread (`listenpost.agent.spool.disk.Disk`).
"""

from __future__ import annotations

import asyncio
import concurrent.futures
from collections import deque
from collections.abc import Awaitable, Callable
from pathlib import Path
from typing import Any, TypeVar

import structlog

from listenpost.agent.spool.disk import Disk
from listenpost.agent.spool.sqlfile import Degraded
from listenpost.agent.spool.values import RETRY_MAX_SECONDS, SealedBatch, SpoolStats
from listenpost.core.clock import Clock
from listenpost.core.errors import SpoolError
from listenpost.core.records import Reading

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
        self._ram_dropped = 0
        """Readings dropped from the full RAM buffer, not yet written to the spool's counter."""
        self._ram_dropped_total = 0
        self._front_dropped = 0
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
        """Queue one reading in memory (O(1), no I/O). Past the RAM cap the oldest reading is dropped."""
        if self._first_add_mono is None:
            self._first_add_mono = self._clock.monotonic()
        self._pending.append(reading)
        if len(self._pending) > self.max_pending_readings:
            self._pending.popleft()
            self._front_dropped += 1
            self._ram_dropped += 1
            self._ram_dropped_total += 1
            if self._ram_dropped_total == 1 or self._ram_dropped_total % 10_000 == 0:
                log.error(
                    "spool_ram_buffer_full",
                    dropped_readings=self._ram_dropped_total,
                    cap=self.max_pending_readings,
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

        Pending acks are applied in the same commit. Returns the last batch sealed, or ``None`` when
        nothing was pending or the storage is failing (then the readings stay in RAM for the retry).
        """
        self._check_open()
        return await self._shielded(self._serial(self._seal, boot, offset_db))

    async def _seal(self, boot: str, offset_db: float) -> SealedBatch | None:
        self._last_offset_db = offset_db
        self._last_boot = boot
        now = self._clock.monotonic()
        if self._snap.degraded and now < self._retry_at:
            return None
        if not self._pending and not self._acks and not self._ram_dropped and not self._snap.degraded:
            return None
        readings = list(self._pending)
        front_dropped = self._front_dropped
        chunks = [
            readings[i : i + self.max_batch_readings]
            for i in range(0, len(readings), self.max_batch_readings)
        ]
        acks = set(self._acks)
        ram_dropped = self._ram_dropped
        try:
            if chunks or ram_dropped:
                sealed = await self._call(
                    self._disk.seal, chunks, boot, offset_db, acks, ram_dropped, now, self._clock.time()
                )
            else:
                sealed = []
                await self._call(self._disk.flush_acks, acks, now, self._clock.time())
        except Degraded:
            return None
        # Readings added while the commit ran stay pending; only the sealed prefix leaves. Readings the
        # RAM cap pushed out meanwhile were in the sealed snapshot, so they are not lost after all.
        pushed_out = self._front_dropped - front_dropped
        for _ in range(len(readings) - pushed_out):
            self._pending.popleft()
        self._ram_dropped -= pushed_out
        self._ram_dropped_total -= pushed_out
        self._first_add_mono = now if self._pending else None
        self._acks -= acks
        self._ram_dropped -= ram_dropped
        for b in sealed:
            log.debug("spool_batch_sealed", epoch=b.epoch, seq=b.seq, readings=b.n_readings)
        return sealed[-1] if sealed else None

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
        """The oldest sealed batch not yet acked or dead-lettered, read from disk (one at a time)."""
        self._check_open()
        if self._snap.degraded:
            return None
        try:
            return await self._shielded(
                self._call(
                    self._disk.peek,
                    set(self._acks),
                    self._last_offset_db,
                    self._clock.monotonic(),
                    self._clock.time(),
                )
            )
        except Degraded:
            return None

    async def ack(self, epoch: str, seq: int) -> None:
        """
        The collector holds this batch: it is never returned by `peek_oldest` again.

        The delete is committed with the next seal (or within ``flush_seconds``); after a crash before
        that, the batch is sent once more and the collector answers ``duplicate``.
        """
        self._check_open()
        self._acks.add((epoch, seq))
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
            readings_pending=len(self._pending),
            oldest_age_s=age,
            next_seq=s.next_seq,
            epoch=s.epoch,
            dropped_batches=s.counters["dropped_batches"],
            dropped_readings=s.counters["dropped_readings"] + self._ram_dropped,
            dead_letters=s.counters["dead_letters"],
            corrupt_set_aside=s.counters["corrupt_set_aside"],
            degraded=s.degraded,
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
        if self._pending:
            log.error("spool_closed_with_pending", readings=len(self._pending))

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
                readings_pending=len(self._pending),
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
