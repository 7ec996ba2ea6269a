"""
The four-timestamp exchange (RFC 5905 §8 notation) that places a board's clock against the collector's.

t1 and t4 are board monotonic seconds (request sent, answer received); t2 and t3 are collector Unix
seconds (request received, answer sent). Both ends use this one formula: the board to carry an
exchange, the collector to fit its clock model (docs/design.md §3).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any


def offset_delay(t1: Any, t2: Any, t3: Any, t4: Any) -> tuple[Any, Any]:
    """
    RFC 5905 §8 on-wire offset and delay of one exchange.

    Takes floats or numpy arrays (element-wise). Returns ``(offset, delay)`` in seconds: offset = collector time − board time at the exchange
    (collector ahead is positive), delay = round trip net of the collector's hold time. Works
    element-wise on numpy arrays too.
    """
    # Subtract within each clock first: T4 − T1 and T3 − T2 are small, so no precision is lost to
    # the 1.8e9-second magnitude of the collector's timestamps.
    offset = ((t2 - t1) + (t3 - t4)) / 2
    delay = (t4 - t1) - (t3 - t2)
    return offset, delay


@dataclass(frozen=True, slots=True)
class Exchange:
    """One four-timestamp exchange."""

    t1: float
    """Board monotonic seconds when the request left."""
    t2: float
    """Collector Unix seconds when the request arrived."""
    t3: float
    """Collector Unix seconds when the answer left."""
    t4: float
    """Board monotonic seconds when the answer arrived."""

    @property
    def offset(self) -> float:
        """Collector time minus board time, seconds: ((T2−T1)+(T3−T4))/2."""
        return float(offset_delay(self.t1, self.t2, self.t3, self.t4)[0])

    @property
    def delay(self) -> float:
        """Round-trip delay without the collector's hold time, seconds: (T4−T1)−(T3−T2)."""
        return float(offset_delay(self.t1, self.t2, self.t3, self.t4)[1])

    def as_dict(self) -> dict[str, float]:
        """The wire form carried in a batch envelope or heartbeat (docs/wire-protocol.md)."""
        return {"t1": self.t1, "t2": self.t2, "t3": self.t3, "t4": self.t4}
