"""
Where advertisements come from. Every source yields `listenpost.core.records.Advert` through ``adverts()``.

=========  ===========================================  =========================================
kind       module                                       what it is
=========  ===========================================  =========================================
bleak      `listenpost.agent.sources.bleak_scan.BleakSource`       live scanning through BlueZ over D-Bus
hci        `listenpost.agent.sources.hci.HciSource`                raw HCI socket (Linux), every report
replay     `open_replay` → `ReplaySource`               recorded logs (.jsonl, .jsonl.gz)
btsnoop    `open_replay` → `ReplaySource`               btsnoop captures (``btmon -w``)
=========  ===========================================  =========================================

Only ``bleak_scan`` imports bleak, and only when a bleak source is opened.
"""

from __future__ import annotations

import asyncio
import enum
import math
import uuid
from collections import deque
from collections.abc import AsyncIterator, Iterable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import structlog

from listenpost.core.clock import Clock, DerivedClock
from listenpost.core.errors import CaptureFormatError, SourceReason, SourceUnavailable
from listenpost.core.records import Advert, BatchSource, Source

if TYPE_CHECKING:
    from listenpost.agent.config import SourceConfig

__all__ = [
    "Source",
    "BatchSource",
    "batches_of",
    "one_by_one",
    "FileKind",
    "detect_kind",
    "open_replay",
    "open_source",
    "ReplaySource",
    "RateMeter",
    "replay_board_clock",
]

log = structlog.get_logger(__name__)


# ---------------------------------------------------------------- batches


async def one_by_one(batches: AsyncIterator[Sequence[Advert]]) -> AsyncIterator[Advert]:
    """Flatten a source's batches into single adverts (closing the batches when the consumer stops)."""
    try:
        async for batch in batches:
            for adv in batch:
                yield adv
    finally:
        await batches.aclose()  # type: ignore[attr-defined]  # an async generator


async def _singles(adverts: AsyncIterator[Advert]) -> AsyncIterator[list[Advert]]:
    try:
        async for adv in adverts:
            yield [adv]
    finally:
        aclose = getattr(adverts, "aclose", None)
        if aclose is not None:
            await aclose()


def batches_of(source: Source) -> AsyncIterator[Sequence[Advert]]:
    """
    The source's adverts in order, as the groups it delivers together: what a `BatchSource` hands over
    per wake-up (replay, raw HCI, bleak's queue), else one list per advert.

    Consumers (the pipeline, the service) take adverts this way, so a wake-up costs one loop turn and one
    pass of the pipeline over its adverts rather than one ``await`` per advert.
    """
    if isinstance(source, BatchSource):
        return source.batches()
    return _singles(source.adverts())


# ---------------------------------------------------------------- effective rate


class RateMeter:
    """
    Events per second per key over a window that slides in whole buckets.

    BlueZ cannot promise one report per advertisement (docs/radio.md §2), so the agent measures what
    it actually gets: per address at the source, per registered tag after the pipeline. The window
    is cut into ``buckets`` equal buckets; `rates` counts the last ``buckets`` *complete* ones and
    divides by their span, so it lags the clock by less than one bucket. With ``buckets=1`` that is
    the last complete window. Right after start the span is only as long as the complete buckets
    seen so far (the first may be partly before the first event). Memory is one dict of counters
    per bucket; a key not heard for a whole window vanishes.
    """

    __slots__ = ("window", "buckets", "_width", "_start", "_idx", "_cur", "_done")

    def __init__(self, window_seconds: float = 60.0, buckets: int = 1) -> None:
        if not window_seconds > 0:
            raise ValueError(f"window_seconds must be > 0, got {window_seconds!r}")
        if isinstance(buckets, bool) or not isinstance(buckets, int) or buckets < 1:
            raise ValueError(f"buckets must be an integer >= 1, got {buckets!r}")
        self.window = float(window_seconds)
        self.buckets = buckets
        self._width = self.window / buckets
        self._start: int | None = None
        self._idx: int | None = None
        self._cur: dict[str, int] = {}
        self._done: deque[tuple[int, dict[str, int]]] = deque()
        """Complete buckets (index, counts), oldest first, at most ``buckets`` of them."""

    def _roll(self, now: float) -> int:
        idx = math.floor(now / self._width)
        if idx != self._idx:
            if self._idx is None:
                self._start = idx
            elif self._cur:
                self._done.append((self._idx, self._cur))
            self._cur = {}
            self._idx = idx
            while self._done and self._done[0][0] < idx - self.buckets:
                self._done.popleft()
        return idx

    def note(self, key: str, now: float) -> None:
        """Count one event of ``key`` at clock time ``now`` (seconds)."""
        if math.floor(now / self._width) != self._idx:
            self._roll(now)
        self._cur[key] = self._cur.get(key, 0) + 1

    def note_many(self, keys: Iterable[str], now: float) -> None:
        """Count one event of each of ``keys`` (repeats count again), all at clock time ``now``."""
        if math.floor(now / self._width) != self._idx:
            self._roll(now)
        cur = self._cur
        for key in keys:
            cur[key] = cur.get(key, 0) + 1

    def span(self, now: float) -> float:
        """Seconds the rates at ``now`` are counted over: the window, or less right after start."""
        idx = self._roll(now)
        assert self._start is not None
        return min(self.buckets, idx - self._start) * self._width

    def rates(self, now: float) -> dict[str, float]:
        """Events per second of each key over the complete buckets of the window before ``now``."""
        span = self.span(now)
        if span <= 0:
            return {}
        total: dict[str, int] = {}
        for _, counts in self._done:
            for k, n in counts.items():
                total[k] = total.get(k, 0) + n
        return {k: n / span for k, n in total.items()}


# ---------------------------------------------------------------- replay


class FileKind(enum.Enum):
    """What a replay file holds, by content."""

    RECORDING = "recording"
    """The project's JSON Lines recording, plain or gzip'd."""
    BTSNOOP = "btsnoop"
    """A btsnoop capture, plain or gzip'd."""


def detect_kind(path: str | Path) -> FileKind:
    """
    Tell a recording from a btsnoop capture by the first bytes (inside gzip if compressed).

    Raises:
        CaptureFormatError: unreadable, or neither format.
    """
    import gzip

    from listenpost.agent.sources.btsnoop import is_btsnoop

    p = Path(path)
    try:
        with open(p, "rb") as f:
            head = f.read(16)
        if head[:2] == b"\x1f\x8b":
            with gzip.open(p, "rb") as g:
                head = g.read(16)
    except (OSError, EOFError) as e:
        raise CaptureFormatError(f"{p}: cannot read: {e}") from e
    except Exception as e:  # zlib.error from damaged gzip data
        raise CaptureFormatError(f"{p}: damaged compressed data: {e}") from e
    if is_btsnoop(head):
        return FileKind.BTSNOOP
    if head.lstrip()[:1] == b"{":
        return FileKind.RECORDING
    raise CaptureFormatError(
        f"{p}: neither a listenpost recording nor a btsnoop capture (starts with {head[:8]!r})"
    )


@dataclass(frozen=True, slots=True)
class ReplayFile:
    path: Path
    kind: FileKind


class ReplaySource:
    """
    Recordings and captures played back in order, paced on the injected clock.

    At ``speed`` S the clock time between two consecutive adverts is (t_i − t_{i−1}) / S; a
    negative step (the next file starts earlier) counts as 0. The source keeps a due time and
    sleeps only when it is ahead of it, so a slow consumer is never made slower by tiny sleeps.
    Wake-ups are at least `PACING_GRAIN_S` apart: an advert due sooner than that after the last
    one waits for the next wake-up, which hands over every advert then due as one batch
    (`batches`). So a dense replay costs one wake-up and one pass of the pipeline per grain rather
    than one per advert, and each advert comes no earlier than its due time and at most one grain
    after it (board times are the recorded ones either way).
    ``speed`` 0 plays as fast as possible, in batches of `YIELD_EVERY` with a loop turn between them.

    Files are read with ordinary buffered reads on the event loop thread: a line at a time from
    local disk, and it keeps the pacing deterministic on a virtual clock.
    """

    YIELD_EVERY = 256
    PACING_GRAIN_S = 2.0
    """
    Shortest clock time between two wake-ups of a paced replay, seconds (the most an advert is late).
    A wake-up costs some 0.5 ms of CPU on a shared core (the event loop's turn, then the pipeline on
    cold caches), as much as 80 adverts through the pipeline. At 206 adverts/s the live replay's CPU
    per advert against the dry run's measured 2.2-2.6 at a 0.25 s grain, 1.5 at 1 s and 1.2-1.3 at 2 s
    (bench/agent_live.py). Two seconds stay inside the spool's 5 s flush; board times never depend on it.
    """

    def __init__(self, files: Sequence[ReplayFile], clock: Clock, speed: float = 1.0) -> None:
        if speed < 0 or not math.isfinite(speed):
            raise ValueError(f"speed must be >= 0, got {speed!r}")
        self.files = list(files)
        self.clock = clock
        self.speed = float(speed)
        self.count = 0
        """Adverts yielded so far."""
        self.headers: list[object] = []
        """Recording headers (or btsnoop stats) of the files opened so far, in order."""

    def _stream(self) -> Iterator[Advert]:
        from listenpost.agent.sources.btsnoop import BtsnoopReader
        from listenpost.agent.sources.replay import read_recording

        for f in self.files:
            if f.kind is FileKind.RECORDING:
                header, it = read_recording(f.path)
                self.headers.append(header)
                yield from it
            else:
                reader = BtsnoopReader(f.path)
                self.headers.append(reader.stats)
                for cap in reader:
                    yield cap.advert
                if reader.stats.truncated or reader.stats.bad_events:
                    log.warning(
                        "capture_replayed_with_losses",
                        file=str(f.path),
                        truncated=reader.stats.truncated,
                        bad_events=reader.stats.bad_events,
                    )

    async def batches(self) -> AsyncIterator[list[Advert]]:
        """
        The adverts in order, as the groups that are due together: what one wake-up hands over when
        paced, everything at speed 0; at most `YIELD_EVERY` per list, with a loop turn after a full one.

        The clock is read once per wake-up and once after each list is handed over (the consumer's
        work took time), never per advert; board times are the recorded ones.
        """
        clock, speed, grain, cap = self.clock, self.speed, self.PACING_GRAIN_S, self.YIELD_EVERY
        now = due = clock.monotonic()
        wake_floor = -math.inf  # no wake-up before this clock time (one grain after the last)
        prev_t: int | None = None
        batch: list[Advert] = []
        try:
            for adv in self._stream():
                if speed > 0:
                    t = adv.t_mono_ns
                    if prev_t is not None and t > prev_t:
                        due += (t - prev_t) / 1e9 / speed
                    prev_t = t
                    if due > now:
                        if batch:
                            self.count += len(batch)
                            yield batch
                            batch = []
                        now = clock.monotonic()
                        if due > now:
                            await clock.sleep(max(due, wake_floor) - now)
                            now = clock.monotonic()
                            wake_floor = now + grain
                batch.append(adv)
                if len(batch) >= cap:
                    self.count += len(batch)
                    yield batch
                    batch = []
                    # A file at full speed (or a consumer behind the schedule) never blocks: let other tasks run.
                    await asyncio.sleep(0)
        except CaptureFormatError:
            # A bad line ends the replay; what came before it is still handed over, as one by one it was.
            if batch:
                self.count += len(batch)
                yield batch
            raise
        if batch:
            self.count += len(batch)
            yield batch

    def adverts(self) -> AsyncIterator[Advert]:
        """The same adverts one at a time."""
        return one_by_one(self.batches())


def open_replay(paths: Sequence[str | Path], clock: Clock, speed: float = 1.0) -> ReplaySource:
    """
    A source replaying ``paths`` in order (recordings and btsnoop captures, detected by content).

    Board time: a recording keeps its recorded ``t``; a capture's board time is its capture time
    relative to the file's first record.

    Raises:
        CaptureFormatError: a file is missing or neither format (checked here, before any replay).
    """
    if not paths:
        raise ValueError("open_replay needs at least one file")
    return ReplaySource([ReplayFile(Path(p), detect_kind(p)) for p in paths], clock, speed)


# ---------------------------------------------------------------- factory


def _missing(kind: str, e: ImportError) -> SourceUnavailable:
    name = e.name or str(e)
    return SourceUnavailable(
        SourceReason.OTHER,
        f"source {kind!r} needs the Python package {name!r}, which is not installed (pip install {name})",
    )


def open_source(cfg: SourceConfig, clock: Clock) -> Source:
    """
    Build the source the config asks for.

    Raises:
        SourceUnavailable: a package the source needs is missing.
        CaptureFormatError: a replay file is missing or of the wrong kind.
        ValueError: an unknown kind (config validation normally catches it first).
    """
    if cfg.kind == "bleak":
        try:
            from listenpost.agent.sources.bleak_scan import BleakSource
        except ImportError as e:
            raise _missing("bleak", e) from e
        return BleakSource(cfg.adapter, clock, cfg.stall_seconds)
    if cfg.kind == "hci":
        from listenpost.agent.sources.hci import HciSource, dev_id_of

        return HciSource(dev_id_of(cfg.adapter), clock)
    if cfg.kind in ("replay", "btsnoop"):
        src = open_replay(list(cfg.files), clock, cfg.speed)
        if cfg.kind == "btsnoop":
            for f in src.files:
                if f.kind is not FileKind.BTSNOOP:
                    raise CaptureFormatError(f"{f.path}: source.kind is 'btsnoop' but this is a recording")
        return src
    raise ValueError(f"unknown source kind {cfg.kind!r}")


async def replay_board_clock(files: Sequence[Path], speed: float, base: Clock) -> DerivedClock:
    """
    A board clock for uploading a replay, on which the recording ends as its replay ends.

    Readings keep their recorded board times; the collector places them through the clock exchanges
    the agent stamps with its clock. On the machine's own monotonic clock a recording would land
    wherever that machine's uptime puts it (hours back, or in the future). This clock reads
    ``c0 + elapsed`` with ``c0`` the earliest start at which no advert is ever ahead of it: at speed S
    advert i is due ``P_i / S`` after the start, ``P_i`` being the board seconds the replay paces up
    to it (the positive steps between adverts, as `ReplaySource` counts them), so
    ``c0 = max_i(t_i − P_i / S)``; as fast as possible (S = 0), ``c0 = max_i t_i``.

    Each replay is a boot of its own (a fresh boot id), so the collector fits it apart from the
    board's live boots and from earlier replays of the same file.

    Raises:
        CaptureFormatError: a file is missing, of neither format, or has a bad line (``file:line``).
    """
    c0: float | None = None
    paced = 0.0
    prev: float | None = None
    async for adv in open_replay(list(files), base, 0.0).adverts():
        t = adv.t_mono_ns / 1e9
        if prev is not None and t > prev:
            paced += t - prev
        prev = t
        due = t - paced / speed if speed > 0 else t
        c0 = due if c0 is None else max(c0, due)
    start = c0 if c0 is not None else 0.0
    return DerivedClock(base, boot_at=base.monotonic() - start, boot_id=str(uuid.uuid4()))
