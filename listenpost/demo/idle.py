"""
Knowing when a fleet on virtual time is idle: which tasks sleep on the clock, which requests are open.

The virtual-time driver steps the clock and then waits until every task that ever slept on it sleeps
on it again and no HTTP request is in flight; these two trackers answer those questions.
"""

from __future__ import annotations

import asyncio
import weakref
from typing import Any

import aiohttp

from listenpost.core.clock import Clock


class TrackingClock:
    """
    A pass-through clock that knows which tasks sleep on it: the virtual-time driver's idle test.

    Every task that ever slept through this clock is a *user*; the fleet is idle when every user
    still running is sleeping here again (and no request is in flight).
    """

    def __init__(self, inner: Clock) -> None:
        self.inner = inner
        self._users: weakref.WeakSet[asyncio.Task[Any]] = weakref.WeakSet()
        self._sleeping: weakref.WeakSet[asyncio.Task[Any]] = weakref.WeakSet()

    @property
    def boot_id(self) -> str:
        return self.inner.boot_id

    def monotonic(self) -> float:
        return self.inner.monotonic()

    def monotonic_ns(self) -> int:
        return self.inner.monotonic_ns()

    def time(self) -> float:
        return self.inner.time()

    async def sleep(self, seconds: float) -> None:
        task = asyncio.current_task()
        if task is None:
            await self.inner.sleep(seconds)
            return
        self._users.add(task)
        self._sleeping.add(task)
        try:
            await self.inner.sleep(seconds)
        finally:
            self._sleeping.discard(task)

    def busy(self) -> list[str]:
        """Names of the clock's users that are running or waiting on something else than the clock."""
        return [t.get_name() for t in list(self._users) if not t.done() and t not in self._sleeping]


class InFlight:
    """Counts the HTTP requests of one `aiohttp.ClientSession` that have not been answered yet."""

    def __init__(self) -> None:
        self._tasks: dict[int, asyncio.Task[Any]] = {}
        self.trace = aiohttp.TraceConfig()
        self.trace.on_request_start.append(self._start)
        self.trace.on_request_end.append(self._end)
        self.trace.on_request_exception.append(self._end)

    async def _start(self, session: Any, ctx: Any, params: Any) -> None:
        task = asyncio.current_task()
        if task is not None:
            self._tasks[id(ctx)] = task

    async def _end(self, session: Any, ctx: Any, params: Any) -> None:
        self._tasks.pop(id(ctx), None)

    @property
    def count(self) -> int:
        """Requests still waiting for an answer (a cancelled requester no longer counts)."""
        for key in [k for k, t in self._tasks.items() if t.done()]:
            del self._tasks[key]
        return len(self._tasks)
