"""
Effective readings per second per registered tag, summarised for the heartbeat.

Through BlueZ over D-Bus a tag advertising at 1-10 Hz may give anything from one reading per
advertisement to one per ~10 s, depending on controller, kernel and BlueZ (docs/radio.md §2): the agent
cannot promise a rate, so it measures the one it gets. `TagRates` counts the pipeline's output —
registered tags only — on the injected clock over a sliding window, and the heartbeat carries only
the distribution over the tags heard (`TagRateSummary`): nothing per tag, and nothing at all about
unregistered devices, leaves the board.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass

from listenpost.agent.sources import RateMeter
from listenpost.core.clock import Clock
from listenpost.core.records import Reading

WINDOW_S = 60.0
"""Length of the sliding window, seconds."""
BUCKETS = 12
"""Buckets per window: the window slides in steps of ``WINDOW_S / BUCKETS`` seconds."""


def percentile(sorted_values: Sequence[float], q: float) -> float:
    """
    The ``q``-th percentile (0-100) of ascending ``sorted_values`` by linear interpolation between
    closest ranks: Hyndman and Fan's definition 7, the default of numpy.percentile and of R.

    Raises:
        ValueError: no values, or ``q`` outside 0-100.
    """
    if not sorted_values:
        raise ValueError("percentile of no values")
    if not 0 <= q <= 100:
        raise ValueError(f"q must be within 0-100, got {q!r}")
    pos = (len(sorted_values) - 1) * q / 100
    lo = math.floor(pos)
    hi = min(lo + 1, len(sorted_values) - 1)
    return sorted_values[lo] + (sorted_values[hi] - sorted_values[lo]) * (pos - lo)


@dataclass(frozen=True, slots=True)
class TagRateSummary:
    """The spread of per-tag reading rates over the tags heard in one window."""

    tags_heard: int
    """Registered tags with at least one reading in the window."""
    median_hz: float | None
    """Median over those tags of readings per second; ``None`` when no tag was heard."""
    p10_hz: float | None
    """10th percentile of the same, readings per second: the slowest tags' rate."""
    window_s: float
    """The span the rates were counted over, seconds (shorter than the window right after start)."""

    def as_stats(self) -> dict[str, float | int | None]:
        """The heartbeat's keys: ``tags_heard``, ``tag_rate_hz_median``, ``tag_rate_hz_p10``, ``tag_rate_window_s``."""
        return {
            "tags_heard": self.tags_heard,
            "tag_rate_hz_median": None if self.median_hz is None else round(self.median_hz, 4),
            "tag_rate_hz_p10": None if self.p10_hz is None else round(self.p10_hz, 4),
            "tag_rate_window_s": round(self.window_s, 3),
        }


class TagRates:
    """
    Readings per registered tag per second over a sliding window of the injected clock.

    Args:
        clock: the injected clock (each reading is counted at the clock time it comes out of the
            pipeline, so replayed recordings are measured at their playback pace).
        window_s: window length, seconds.
        buckets: the window slides in ``window_s / buckets`` steps; rates cover complete buckets.
    """

    __slots__ = ("clock", "_meter")

    def __init__(self, clock: Clock, window_s: float = WINDOW_S, buckets: int = BUCKETS) -> None:
        self.clock = clock
        self._meter = RateMeter(window_s, buckets)

    def note(self, tag: str) -> None:
        """Count one reading of ``tag`` (a registered tag: the pipeline's output) now."""
        self._meter.note(tag, self.clock.monotonic())

    def note_readings(self, readings: Iterable[Reading]) -> None:
        """Count the readings of one batch, all at one reading of the clock (they came out together)."""
        self._meter.note_many((r.tag for r in readings), self.clock.monotonic())

    def rates(self) -> dict[str, float]:
        """Readings per second of each tag heard in the window. Stays on the board."""
        return self._meter.rates(self.clock.monotonic())

    def summary(self) -> TagRateSummary:
        """Median and 10th percentile over the tags heard, with their number."""
        m = self._meter
        now = self.clock.monotonic()
        values = sorted(m.rates(now).values())
        span = m.span(now)
        if not values:
            return TagRateSummary(0, None, None, span)
        return TagRateSummary(len(values), percentile(values, 50), percentile(values, 10), span)


__all__ = ["BUCKETS", "WINDOW_S", "TagRateSummary", "TagRates", "percentile"]
