"""
``listenpost agent record --out FILE``: write what a live source hears to a recording.

The output file is created only when the first advertisement arrives, and an existing file is
never overwritten, so a failed start leaves nothing half-written behind.
"""

from __future__ import annotations

import asyncio
import socket
import sys
from collections.abc import AsyncIterator
from dataclasses import dataclass
from pathlib import Path

import structlog

from listenpost.agent.sources.replay import RecordingWriter
from listenpost.core.clock import Clock, SystemClock
from listenpost.core.errors import ConfigError, SourceUnavailable
from listenpost.core.records import Advert, Source

log = structlog.get_logger(__name__)


@dataclass(frozen=True, slots=True)
class RecordResult:
    """What one recording run produced."""

    adverts: int
    """Lines written after the header."""
    addresses: int
    """Distinct addresses heard."""
    seconds: float
    """Clock time the recording ran."""


async def record(
    out: Path, source: Source, clock: Clock, *, board: str, seconds: float | None
) -> RecordResult:
    """
    Copy ``source`` into a recording at ``out`` until ``seconds`` of clock time pass (or for ever).

    Raises:
        SourceUnavailable: from the source, e.g. no Bluetooth; ``out`` is then not created.
    """
    start = clock.monotonic()
    wall = clock.time()
    writer: RecordingWriter | None = None
    addresses: set[str] = set()

    async def copy(it: AsyncIterator[Advert]) -> None:
        nonlocal writer
        async for adv in it:
            if writer is None:
                writer = RecordingWriter(out, board=board, boot=clock.boot_id, wall_at_start=wall)
            writer.write(adv)
            addresses.add(adv.address)

    it = source.adverts()
    copier = asyncio.ensure_future(copy(it))
    timer = asyncio.ensure_future(clock.sleep(seconds)) if seconds is not None else None
    try:
        waiting = {copier} | ({timer} if timer else set())
        await asyncio.wait(waiting, return_when=asyncio.FIRST_COMPLETED)
        if copier.done():
            copier.result()  # a source error surfaces here
    finally:
        for t in (copier, timer):
            if t is not None and not t.done():
                t.cancel()
        await asyncio.gather(copier, *([timer] if timer else []), return_exceptions=True)
        aclose = getattr(it, "aclose", None)
        if aclose is not None:
            await aclose()
        if writer is not None:
            writer.close()
    return RecordResult(writer.count if writer else 0, len(addresses), clock.monotonic() - start)


def record_command(
    out: Path, *, config: Path | None, source: str | None, adapter: str | None, seconds: float | None
) -> int:
    """Entry point of ``listenpost agent record``; returns the exit code."""
    kind, board, stall = "bleak", socket.gethostname().lower() or "board", 60.0
    if config is not None:
        from listenpost.agent.config import load_agent_config

        cfg = load_agent_config(config)
        kind, board, stall = cfg.source.kind, cfg.board, cfg.source.stall_seconds
        adapter = adapter or cfg.source.adapter
    kind = source or kind
    if kind not in ("bleak", "hci"):
        raise ConfigError(f"--source: record needs a live source (bleak or hci), got {kind!r}")
    if seconds is not None and seconds <= 0:
        raise ConfigError(f"--seconds: must be > 0, got {seconds}")
    if out.exists():
        raise ConfigError(f"--out: {out} exists; refusing to overwrite a recording")
    from listenpost.core.logs import configure

    configure("auto", "info", board=board)  # a command entry point: logs go to stderr, stdout stays clean
    clock = SystemClock()
    src: Source
    if kind == "bleak":
        try:
            from listenpost.agent.sources.bleak_scan import BleakSource
        except ImportError as e:
            print(
                f"listenpost: cannot record: source 'bleak' needs the Python package {e.name!r}",
                file=sys.stderr,
            )
            return 1
        # an interactive command: report a radio that cannot start at once instead of retrying for ever
        src = BleakSource(adapter, clock, stall, max_failures=1)
    else:
        from listenpost.agent.sources.hci import HciSource, dev_id_of

        src = HciSource(dev_id_of(adapter), clock)
    try:
        result = asyncio.run(record(out, src, clock, board=board, seconds=seconds))
    except SourceUnavailable as e:
        print(
            f"listenpost: cannot record from {kind} ({adapter or 'default adapter'}): {e} [{e.reason.value}]",
            file=sys.stderr,
        )
        return 1
    except KeyboardInterrupt:
        print(f"listenpost: recording stopped; {out} holds what was heard", file=sys.stderr)
        return 0
    print(
        f"recorded {result.adverts} adverts from {result.addresses} addresses in {result.seconds:.1f} s"
        + (f" to {out}" if result.adverts else " (nothing heard, no file written)"),
        file=sys.stderr,
    )
    return 0
