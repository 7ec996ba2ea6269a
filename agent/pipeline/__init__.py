"""
decode → filter → calibrate, run as a plain loop over small callables (DEVELOPERS.md, conventions).

`Pipeline.stats` is what the heartbeat reports about the radio side of a board. Every advert lands in
exactly one of the outcome counters, so

    adverts_total == adverts_registered + dropped_unregistered + no_identity + decode_errors
                     + tlm_unmatched + dropped_other

and ``readings_total`` (handed to the sink) equals ``adverts_registered - dropped_other``.
"""

from __future__ import annotations

import asyncio
import inspect
from collections.abc import Awaitable, Callable, Iterable, Sequence
from types import BuiltinFunctionType, FunctionType, MethodType
from typing import Any

from listenpost.agent.pipeline.calibrate import Calibrate
from listenpost.agent.pipeline.decode import Decoder
from listenpost.agent.pipeline.filter import TagFilter
from listenpost.agent.sources import batches_of
from listenpost.core.records import Advert, Reading, Source, Stage
from listenpost.core.settings import DecodeRule

Sink = Callable[[Reading], Awaitable[None] | None]
"""Where readings go (the spool, a list, stdout); may be sync or async."""

_YIELD_EVERY = 1024
"""Adverts between forced event-loop turns in `Pipeline.run` (a fast file source never blocks)."""

STATS_DOC = {
    "adverts_total": "advertisements received from the source",
    "adverts_decoded": "adverts that named a tag identity (registered or not)",
    "adverts_registered": "adverts whose identity is in the registered tag set",
    "dropped_unregistered": "adverts with a decoded identity that is not registered",
    "no_identity": "adverts naming no tag (no known format, no configured rule, address not registered)",
    "decode_errors": "adverts dropped because a frame broke its format's layout (truncated, overlong, empty)",
    "tlm_unmatched": "Eddystone-TLM frames from an address with no recent registered Eddystone-UID",
    "dropped_other": "readings dropped by stages after the filter",
    "readings_total": "readings handed to the sink",
    "telemetry_total": "decoded readings that carry Eddystone-TLM telemetry",
    "registered_tags": "size of the registered tag set",
}
"""Every key of `Pipeline.stats`, with its meaning (all are counts since the pipeline was built)."""


class Pipeline:
    """
    One decoder and the stages after it.

    Args:
        decoder: `Advert` → `Reading` or ``None``.
        stages: run in order on each reading; a stage returning ``None`` drops it.
    """

    __slots__ = ("decoder", "stages", "adverts_total", "readings_total", "_stages_tuple", "_calls")

    def __init__(self, decoder: Decoder, stages: Sequence[Stage]) -> None:
        self.decoder = decoder
        self.stages = list(stages)
        self._stages_tuple = tuple(self.stages)
        self._calls = (_direct(decoder), tuple(_direct(st) for st in self._stages_tuple))
        self.adverts_total = 0
        self.readings_total = 0

    @property
    def tag_filter(self) -> TagFilter | None:
        """The `TagFilter` among the stages, if any."""
        return next((s for s in self._stages_tuple if isinstance(s, TagFilter)), None)

    @property
    def calibrate(self) -> Calibrate | None:
        """The `Calibrate` stage, if any."""
        return next((s for s in self._stages_tuple if isinstance(s, Calibrate)), None)

    def update_tags(self, tags: Iterable[str]) -> None:
        """Replace the registered tag set (the collector's config changed).

        Raises:
            ValueError: the pipeline has no `TagFilter`; DecodeError: a malformed identity.
        """
        f = self.tag_filter
        if f is None:
            raise ValueError("pipeline has no tag filter")
        f.update(tags)

    def set_offset_db(self, offset_db: float) -> None:
        """Change the board RSSI offset (dB).

        Raises:
            ValueError: the pipeline has no `Calibrate` stage; ConfigError: offset out of range.
        """
        c = self.calibrate
        if c is None:
            raise ValueError("pipeline has no calibrate stage")
        c.offset_db = offset_db

    def process(self, advert: Advert) -> Reading | None:
        """Run one advert through decode and every stage; ``None`` if anything dropped it."""
        out = self.process_batch((advert,))
        return out[0] if out else None

    def process_batch(self, adverts: Sequence[Advert]) -> list[Reading]:
        """The readings that survive decode and every stage, in the adverts' order.

        A source hands over what is due per wake-up; one call per batch keeps the loop below tight.
        """
        decoder, stages = self._calls
        out: list[Reading] = []
        append = out.append
        self.adverts_total += len(adverts)
        for advert in adverts:
            r = decoder(advert)
            if r is None:
                continue
            for stage in stages:
                r = stage(r)
                if r is None:
                    break
            else:
                append(r)
        self.readings_total += len(out)
        return out

    async def run(self, source: Source, sink: Sink) -> None:
        """Feed every advert of ``source`` through the pipeline, batch by batch, and each surviving
        reading to ``sink``.

        Returns when the source ends; cancel the task to stop a radio source.
        """
        n = 0
        async for batch in batches_of(source):
            for r in self.process_batch(batch):
                out = sink(r)
                if out is not None and inspect.isawaitable(out):
                    await out
            n += len(batch)
            if n >= _YIELD_EVERY:
                # A source that never blocks (a file at full speed): give heartbeats and uplink their turn.
                n = 0
                await asyncio.sleep(0)

    def stats(self) -> dict[str, int]:
        """Counters for the heartbeat; keys and meanings in `STATS_DOC`."""
        d = self.decoder
        f = self.tag_filter
        kept = f.kept if f is not None else d.decoded
        # An attached decoder drops unregistered tags itself (on raw bytes); a standalone one leaves it to the filter.
        dropped = d.unregistered + (f.dropped if f is not None else 0)
        return {
            "adverts_total": self.adverts_total,
            "adverts_decoded": d.decoded + d.unregistered,
            "adverts_registered": kept,
            "dropped_unregistered": dropped,
            "no_identity": d.no_identity,
            "decode_errors": d.decode_errors,
            "tlm_unmatched": d.tlm_unmatched,
            "dropped_other": kept - self.readings_total,
            "readings_total": self.readings_total,
            "telemetry_total": d.telemetry,
            "registered_tags": len(f) if f is not None else 0,
        }


def _direct(fn: Callable[[Any], Any]) -> Callable[[Any], Any]:
    """The bound ``__call__`` of a callable object: calling it skips a type-slot lookup per call."""
    if isinstance(fn, FunctionType | BuiltinFunctionType | MethodType):
        return fn
    return fn.__call__


def build_pipeline(tags: Iterable[str], rules: Sequence[DecodeRule] = (), offset_db: float = 0.0) -> Pipeline:
    """
    The agent's pipeline: decode (attached to the filter) → `TagFilter` → `Calibrate`.

    Raises:
        DecodeError: a tag identity is malformed; ConfigError: the offset is out of range.
    """
    tag_filter = TagFilter(tags)
    return Pipeline(Decoder(rules, registry=tag_filter), [tag_filter, Calibrate(offset_db)])
