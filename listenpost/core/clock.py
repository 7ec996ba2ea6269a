"""
The injected clock. Every component reads time and sleeps only through one of these,
so tests and the demo can run on virtual time and nothing in the test suite sleeps.

Board time is the monotonic clock that keeps counting through suspend (``CLOCK_BOOTTIME``):
a wall-clock step after an NTP sync cannot reorder readings. The boot id tells the
collector when that clock restarted from zero.
"""

from __future__ import annotations

import asyncio
import contextlib
import heapq
import itertools
import time as _time
import uuid
from collections.abc import Awaitable
from pathlib import Path
from typing import Protocol, TypeVar

T = TypeVar("T")


class Clock(Protocol):
    """What components may ask about time."""

    @property
    def boot_id(self) -> str:
        """Identifier of the current boot; board monotonic time restarts with each one."""
        ...

    def monotonic_ns(self) -> int:
        """Board monotonic time, nanoseconds since boot."""
        ...

    def monotonic(self) -> float:
        """Board monotonic time, seconds since boot."""
        ...

    def time(self) -> float:
        """Wall-clock time, Unix seconds (may be wrong or step on a board without network time)."""
        ...

    async def sleep(self, seconds: float) -> None:
        """Wait ``seconds`` of this clock's time."""
        ...


def _read_boot_id() -> str:
    try:
        return Path("/proc/sys/kernel/random/boot_id").read_text().strip()
    except OSError:  # not Linux: one id per process is the best we can do
        return str(uuid.uuid4())


class SystemClock:
    """The machine's clocks."""

    __slots__ = ("_boot_id", "_mono_id")

    def __init__(self) -> None:
        self._boot_id = _read_boot_id()
        self._mono_id = getattr(_time, "CLOCK_BOOTTIME", _time.CLOCK_MONOTONIC)

    @property
    def boot_id(self) -> str:
        return self._boot_id

    def monotonic_ns(self) -> int:
        return _time.clock_gettime_ns(self._mono_id)

    def monotonic(self) -> float:
        return _time.clock_gettime_ns(self._mono_id) / 1e9

    def time(self) -> float:
        return _time.time()

    async def sleep(self, seconds: float) -> None:
        await asyncio.sleep(max(0.0, seconds))


class VirtualClock:
    """
    A clock that moves only when told to. Sleepers wake in deadline order as ``advance`` passes them.

    Example::

        clock = VirtualClock()
        task = asyncio.create_task(worker(clock))
        await clock.advance(30)      # worker's sleeps up to t=30 s have all returned
    """

    def __init__(
        self, start: float = 1000.0, wall: float = 1_800_000_000.0, boot_id: str = "virtual-boot-0"
    ) -> None:
        self._now = float(start)
        self._wall_minus_mono = wall - start
        self._boot_id = boot_id
        self._sleepers: list[tuple[float, int, asyncio.Future[None]]] = []
        self._counter = itertools.count()

    @property
    def boot_id(self) -> str:
        return self._boot_id

    def monotonic_ns(self) -> int:
        return round(self._now * 1e9)

    def monotonic(self) -> float:
        return self._now

    def time(self) -> float:
        return self._now + self._wall_minus_mono

    def step_wall(self, seconds: float) -> None:
        """Step the wall clock (as an NTP sync after a power cut would); monotonic time is untouched."""
        self._wall_minus_mono += seconds

    def reboot(self, boot_id: str, start: float = 0.0) -> None:
        """Simulate a reboot: new boot id, monotonic time restarts at ``start``; wall time continues."""
        wall = self.time()
        self._boot_id = boot_id
        self._now = start
        self._wall_minus_mono = wall - start

    async def sleep(self, seconds: float) -> None:
        if seconds <= 0:
            await asyncio.sleep(0)
            return
        fut: asyncio.Future[None] = asyncio.get_running_loop().create_future()
        heapq.heappush(self._sleepers, (self._now + seconds, next(self._counter), fut))
        await fut

    @property
    def pending_sleepers(self) -> int:
        """How many sleeps are waiting (handy to wait until a task has reached its sleep)."""
        return sum(1 for _, _, f in self._sleepers if not f.done())

    async def advance(self, seconds: float) -> None:
        """Move time forward, waking each sleeper at its own deadline and letting it run."""
        await settle()  # tasks created just before this call get to reach their first sleep
        target = self._now + seconds
        while self._sleepers and self._sleepers[0][0] <= target:
            deadline, _, fut = heapq.heappop(self._sleepers)
            self._now = max(self._now, deadline)
            if not fut.done():
                fut.set_result(None)
            await settle()
        self._now = max(self._now, target)
        await settle()


async def settle(rounds: int = 20) -> None:
    """Let ready tasks run until they block again (a few event-loop turns)."""
    for _ in range(rounds):
        await asyncio.sleep(0)


async def with_timeout(clock: Clock, aw: Awaitable[T], seconds: float, what: str) -> T:
    """
    Await ``aw`` for at most ``seconds`` of ``clock`` time (`asyncio.timeout` only knows real time).

    Raises:
        TimeoutError: naming ``what``, once the time is up (``aw`` is cancelled first).
    """
    task = asyncio.ensure_future(aw)
    timer = asyncio.ensure_future(clock.sleep(seconds))
    try:
        await asyncio.wait({task, timer}, return_when=asyncio.FIRST_COMPLETED)
    except asyncio.CancelledError:
        task.cancel()
        raise
    finally:
        timer.cancel()
    if task.done():
        return task.result()
    task.cancel()
    with contextlib.suppress(asyncio.CancelledError, Exception):
        await task
    raise TimeoutError(f"{what} did not finish within {seconds:g} s")


class ScaledClock:
    """Real time sped up by ``speed`` (the demo); sleeps take ``1/speed`` of their nominal time."""

    def __init__(self, speed: float, boot_id: str | None = None, wall: float | None = None) -> None:
        if speed <= 0:
            raise ValueError(f"speed must be > 0, got {speed!r}")
        self.speed = speed
        self._t0 = _time.monotonic()
        self._wall0 = _time.time() if wall is None else wall
        self._boot_id = boot_id or str(uuid.uuid4())

    @property
    def boot_id(self) -> str:
        return self._boot_id

    def monotonic(self) -> float:
        return (_time.monotonic() - self._t0) * self.speed

    def monotonic_ns(self) -> int:
        return round(self.monotonic() * 1e9)

    def time(self) -> float:
        return self._wall0 + self.monotonic()

    async def sleep(self, seconds: float) -> None:
        await asyncio.sleep(max(0.0, seconds) / self.speed)


class DerivedClock:
    """
    A board clock running off another clock: its own skew, boot time and wall-clock error.

    ``monotonic = (base.monotonic() - boot_at) * (1 + skew_ppm·1e-6)``; the wall clock is the
    base's wall clock plus ``wall_error_s``. Used for virtual boards in the demo and tests.
    """

    def __init__(
        self,
        base: Clock,
        *,
        skew_ppm: float = 0.0,
        boot_at: float | None = None,
        wall_error_s: float = 0.0,
        boot_id: str | None = None,
    ) -> None:
        self.base = base
        self.rate = 1.0 + skew_ppm * 1e-6
        self.boot_at = base.monotonic() if boot_at is None else boot_at
        self.wall_error_s = wall_error_s
        self._boot_id = boot_id or str(uuid.uuid4())

    @property
    def boot_id(self) -> str:
        return self._boot_id

    def monotonic(self) -> float:
        return (self.base.monotonic() - self.boot_at) * self.rate

    def monotonic_ns(self) -> int:
        return round(self.monotonic() * 1e9)

    def time(self) -> float:
        return self.base.time() + self.wall_error_s

    async def sleep(self, seconds: float) -> None:
        await self.base.sleep(seconds / self.rate)
