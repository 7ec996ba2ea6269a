"""The injected clocks: virtual time wakes sleepers in order; derived board clocks skew as told."""

from __future__ import annotations

import asyncio

import pytest

from listenpost.core.clock import DerivedClock, ScaledClock, SystemClock, VirtualClock, with_timeout


async def test_virtual_clock_wakes_sleepers_in_deadline_order(clock: VirtualClock) -> None:
    """Each sleeper returns at its own deadline, not at the end of the advance."""
    woke: list[tuple[str, float]] = []

    async def sleeper(name: str, s: float) -> None:
        await clock.sleep(s)
        woke.append((name, clock.monotonic()))

    start = clock.monotonic()
    tasks = [asyncio.create_task(sleeper(n, s)) for n, s in (("c", 30), ("a", 10), ("b", 20))]
    await clock.advance(0)
    assert clock.pending_sleepers == 3
    await clock.advance(25)
    assert woke == [("a", start + 10), ("b", start + 20)]
    await clock.advance(5)
    assert woke[-1] == ("c", start + 30)
    await asyncio.gather(*tasks)


async def test_virtual_clock_periodic_loop_counts_exactly(clock: VirtualClock) -> None:
    """A loop sleeping 5 s runs exactly 12 times in 60 virtual seconds."""
    ticks = 0

    async def loop() -> None:
        nonlocal ticks
        while True:
            await clock.sleep(5)
            ticks += 1

    task = asyncio.create_task(loop())
    await clock.advance(60)
    task.cancel()
    assert ticks == 12


def test_wall_step_and_reboot_leave_monotonic_sane(clock: VirtualClock) -> None:
    """A wall-clock step moves time() only; a reboot restarts monotonic time with a new boot id."""
    mono, wall = clock.monotonic(), clock.time()
    clock.step_wall(-3600)
    assert clock.monotonic() == mono
    assert clock.time() == pytest.approx(wall - 3600)
    clock.reboot("boot-2")
    assert clock.boot_id == "boot-2"
    assert clock.monotonic() == 0.0
    assert clock.time() == pytest.approx(wall - 3600)


async def test_derived_clock_runs_fast_by_its_skew(clock: VirtualClock) -> None:
    """+85 ppm: after 1000 s of base time the board has counted 1000.085 s; its sleeps shrink to match."""
    board = DerivedClock(clock, skew_ppm=85, wall_error_s=-11520)
    await clock.advance(1000)
    assert board.monotonic() == pytest.approx(1000.085, abs=1e-9)
    assert board.time() == pytest.approx(clock.time() - 11520)
    t0 = clock.monotonic()
    task = asyncio.create_task(board.sleep(1000.085))
    await clock.advance(1000.0001)
    assert task.done()
    assert clock.monotonic() - t0 == pytest.approx(1000.0001)


def test_system_clock_reads_boot_id_and_monotonic() -> None:
    """The system clock gives a boot id and a monotonic time that does not go backwards."""
    c = SystemClock()
    assert c.boot_id
    a, b = c.monotonic_ns(), c.monotonic_ns()
    assert b >= a > 0


def test_scaled_clock_rejects_bad_speed() -> None:
    """A speed of zero would divide sleeps by zero: refused with the value named."""
    with pytest.raises(ValueError, match="speed must be > 0"):
        ScaledClock(0)


async def test_with_timeout_runs_on_the_injected_clock(clock: VirtualClock) -> None:
    """A slow awaitable is cancelled after its seconds of clock time; a quick one returns its value."""
    cancelled = asyncio.Event()

    async def slow() -> int:
        try:
            await clock.sleep(10)
        except asyncio.CancelledError:
            cancelled.set()
            raise
        return 1

    async def quick() -> int:
        await clock.sleep(1)
        return 2

    task = asyncio.create_task(with_timeout(clock, slow(), 3, "slow call"))
    await clock.advance(2.9)
    assert not task.done()
    await clock.advance(0.1)
    with pytest.raises(TimeoutError, match="slow call did not finish within 3 s"):
        await task
    assert cancelled.is_set()
    task = asyncio.create_task(with_timeout(clock, quick(), 3, "quick call"))
    await clock.advance(1)
    assert await task == 2
    assert clock.pending_sleepers == 0  # the timer went with it
