"""
Values that flow through the agent pipeline, and the shapes of its stages.

    source ──Advert──► decode ──Reading──► filter ──► calibrate ──► spool

Every source yields `Advert`; `decode` turns one into a `Reading` (or drops it);
the later stages take and return `Reading`, returning ``None`` to drop.
"""

from __future__ import annotations

from collections.abc import AsyncIterator, Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, Protocol, runtime_checkable

#: Bluetooth Base UUID suffix: a 16-bit UUID ``xxxx`` is ``0000xxxx`` + this.
BASE_UUID_SUFFIX = "-0000-1000-8000-00805f9b34fb"


def uuid16_to_128(short: int) -> str:
    """Expand a 16-bit Bluetooth UUID to its 128-bit lower-case text form."""
    return f"0000{short:04x}{BASE_UUID_SUFFIX}"


@dataclass(frozen=True, slots=True)
class Advert:
    """One advertisement (or scan response) as heard by this board's radio."""

    t_mono_ns: int
    """Board monotonic time of reception (CLOCK_BOOTTIME), nanoseconds."""
    address: str
    """On-air device address, upper-case colon form ``"C4:7A:10:00:2B:91"``."""
    address_type: int
    """HCI Address_Type: 0 public, 1 random, 2 public identity, 3 random static identity."""
    rssi_dbm: int
    """Received signal strength as the controller reported it, dBm (no offset applied)."""
    tx_power_dbm: int | None = None
    """TX Power Level AD structure (0x0A), dBm, if the advertisement carried one."""
    manufacturer_data: Mapping[int, bytes] = field(default_factory=dict)
    """Manufacturer Specific Data (0xFF) keyed by company ID; value without the ID bytes."""
    service_data: Mapping[str, bytes] = field(default_factory=dict)
    """Service Data (0x16/0x20/0x21) keyed by 128-bit UUID text (lower case); value without the UUID."""
    service_uuids: tuple[str, ...] = ()
    """Advertised service UUIDs, 128-bit lower-case text."""
    local_name: str | None = None
    """Complete (or shortened) local name, if any."""
    platform_data: Any = None
    """Source-specific extras (HCI event type, btsnoop adapter index, ...). Not a stable API."""


@dataclass(frozen=True, slots=True)
class Telemetry:
    """Tag housekeeping carried by some frames (Eddystone-TLM). ``None`` means "not reported"."""

    battery_mv: int | None = None
    """Battery voltage, millivolts."""
    temperature_c: float | None = None
    """Beacon temperature, degrees Celsius."""
    adv_count: int | None = None
    """Advertisements sent since power-up."""
    uptime_s: float | None = None
    """Seconds since power-up, as the tag counts them."""


@dataclass(frozen=True, slots=True)
class Reading:
    """One registered tag heard once: what the board stores and sends."""

    tag: str
    """Canonical tag identity (docs/design.md §4), e.g. ``"mac:C4:7A:10:00:2B:91"``."""
    t_mono_ns: int
    """Board monotonic time of reception, nanoseconds."""
    rssi_dbm: float
    """RSSI in dBm; raw after decode, board offset added after calibrate."""
    telemetry: Telemetry | None = None
    """Tag telemetry decoded from this frame, if it carried any."""


Decoder = Callable[[Advert], Reading | None]
"""Turn an advertisement into a reading of a tag identity, or ``None`` when it names no tag."""

Stage = Callable[[Reading], Reading | None]
"""A pure pipeline step after decode; return ``None`` to drop the reading."""


class Source(Protocol):
    """Anything that yields advertisements: a radio, a recording, a capture file."""

    def adverts(self) -> AsyncIterator[Advert]:
        """Yield advertisements until the source ends (files) or is cancelled (radios)."""
        ...


@runtime_checkable
class BatchSource(Source, Protocol):
    """A source that can hand over, in order, the advertisements that arrived or fell due together."""

    def batches(self) -> AsyncIterator[Sequence[Advert]]:
        """Yield non-empty lists of advertisements; flattened, they are exactly what ``adverts()`` yields."""
        ...
