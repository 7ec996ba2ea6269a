"""
One virtual board: a real agent replaying the board's recording on a clock derived from the fleet's
base clock with the board's true skew, boot time and wall-clock error.
"""

from __future__ import annotations

import asyncio
import contextlib
import math
from collections.abc import AsyncIterator
from pathlib import Path
from typing import Any

import aiohttp

from listenpost.core.clock import Clock, DerivedClock
from listenpost.core.records import Advert
from listenpost.demo.collector import REQUEST_TIMEOUT_S, FleetError
from listenpost.sim.truth import BoardTruth

PACE_S = 0.5
"""Replay pacing grain, board seconds: adverts are handed to the agent when the board clock passes
the next multiple of this after their recorded time (a radio's scan window delivers in bursts too)."""


class BoardTimeReplay:
    """
    A board's recording delivered when the board's clock reaches each advert's recorded time.

    The recording is read by the agent's own replay source (`listenpost.agent.sources.open_replay`, unpaced);
    this wrapper only holds each advert back until ``clock.monotonic()`` reaches its ``t`` rounded up
    to ``pace_s``. Pacing by absolute board time (not by time since start) keeps every virtual board
    aligned with the truth however late its agent started.
    """

    def __init__(self, paths: list[Path], clock: Clock, pace_s: float = PACE_S) -> None:
        from listenpost.agent.sources import open_replay

        if pace_s <= 0:
            raise ValueError(f"pace_s must be > 0, got {pace_s!r}")
        self.clock = clock
        self.pace_s = pace_s
        self.inner = open_replay(paths, clock, 0.0)
        self.count = 0
        """Adverts delivered so far."""

    async def adverts(self) -> AsyncIterator[Advert]:
        clock, q = self.clock, self.pace_s
        async for adv in self.inner.adverts():
            t = adv.t_mono_ns / 1e9
            wait = t - clock.monotonic()
            if wait > 0:
                # Sleep to the grain boundary after t; the small tolerance keeps float rounding of a
                # derived clock from pushing an advert one whole grain late.
                boundary = math.ceil(t / q - 1e-9) * q
                await clock.sleep(max(boundary - clock.monotonic(), 0.0))
            self.count += 1
            yield adv


class VirtualBoard:
    """One board: its derived clock, state directory, enrollment and agent task."""

    def __init__(
        self, truth: BoardTruth, base: Clock, recording_start: float, state_dir: Path, pace_s: float = PACE_S
    ) -> None:
        self.truth = truth
        self.state_dir = state_dir
        self.pace_s = pace_s
        # boot_at is where the board's monotonic clock read zero: uptime before the recording start.
        self.clock = DerivedClock(
            base,
            skew_ppm=truth.skew_ppm,
            boot_at=recording_start - truth.uptime_at_start_s,
            wall_error_s=truth.wall_error_s,
            boot_id=truth.boot,
        )
        self.cfg: Any = None
        self.service: Any = None
        self.source: BoardTimeReplay | None = None
        self.task: asyncio.Task[int] | None = None
        self.powered_off = False

    @property
    def name(self) -> str:
        return self.truth.name

    async def enroll(self, url: str, code: str, session: aiohttp.ClientSession) -> None:
        """The real enrollment: credential and agent.yaml in this board's state directory."""
        from listenpost.agent.client.enroll import EnrollStatus, enroll
        from listenpost.agent.config import load_agent_config

        result = await enroll(
            url,
            code,
            self.state_dir,
            clock=self.clock,
            session=session,
            attempts=2,
            backoff_s=1.0,
            fingerprint_data={"machine_id": f"virtual-{self.name}", "model": "listenpost virtual board"},
        )
        if result.status is not EnrollStatus.ENROLLED or result.config_path is None:
            raise FleetError(f"{self.name}: enrollment failed: {result.message}")
        self.cfg = load_agent_config(result.config_path)

    def start(self, session: aiohttp.ClientSession) -> None:
        """Run the agent on this board's recording until stopped or powered off."""
        from listenpost.agent.service import run_agent

        def keep(service: Any) -> None:
            self.service = service

        self.source = BoardTimeReplay([self.truth.recording], self.clock, self.pace_s)
        self.task = asyncio.create_task(
            run_agent(self.cfg, clock=self.clock, source=self.source, session=session, on_start=keep),
            name=f"agent:{self.name}",
        )

    async def power_off(self) -> None:
        """
        A power cut: the agent task is cancelled where it stands. Nothing is drained or sent after it.

        (The service's cancellation path still closes its spool file, which seals what was in memory
        into the on-board spool; nothing of it reaches the collector, which is what a cut looks like
        from the collector's side.)
        """
        self.powered_off = True
        if self.task is not None and not self.task.done():
            self.task.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await self.task

    async def stop(self) -> None:
        """A clean stop (end of the run), as SIGTERM would do."""
        if self.task is None or self.task.done():
            return
        if self.service is not None:
            self.service.request_stop()
        try:
            await asyncio.wait_for(asyncio.shield(self.task), timeout=REQUEST_TIMEOUT_S * 3)
        except TimeoutError:
            self.task.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await self.task
