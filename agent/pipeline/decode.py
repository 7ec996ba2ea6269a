"""
Advertisement → reading of a canonical tag identity (see `listenpost.core.identity`).

Precedence, first match wins:

1. **Registered address.** When the decoder is attached to the `TagFilter`, an address registered as
   ``mac:`` wins before any payload is looked at: one dict lookup, the cheapest drop-or-keep there is,
   and a tag registered by address stays that tag whatever its payload says.
2. **iBeacon format**: manufacturer data, company 0x004C, payload ``02 15`` + UUID(16) + major(u16 BE)
   + minor(u16 BE) + measured power(s8) — exactly 23 bytes.
3. **AltBeacon**: manufacturer data of any company, payload ``BE AC`` + beacon id(20) + reference
   RSSI(s8) + reserved(1) — exactly 24 bytes.
4. **Eddystone** (service data of UUID 0xFEAA): UID frame 0x00 (18 bytes, or 20 with the RFU bytes)
   → ``eddystone:`` identity; plain TLM frame 0x20 version 0x00 (14 bytes) → `Telemetry`, credited to
   the Eddystone identity last seen from the same address (bounded LRU). URL, EID and encrypted TLM
   frames name no tag and fall through.
5. **Configured rules** (`listenpost.core.settings.DecodeRule`), in config order. Built-in formats go first
   because their layouts are fully specified; a rule is for firmware none of them describes.
6. **Address, standalone only.** Without a `TagFilter` (tools that want every device) any advert not
   named otherwise becomes ``mac:<address>``. With a filter it does not: an unregistered address was
   already ruled out in step 1.

Attached to a filter, the decoder also matches recognised identities against the registered set by
their raw bytes (`listenpost.agent.pipeline.filter.Registered`), so an unregistered tag is counted and dropped without
its identity ever being formatted, and only registered Eddystone tags are remembered for TLM.
Detached, it formats every identity and leaves the dropping to the filter; both give the same
readings (tests/agent/test_decode.py checks that).

Bytes off the air are never trusted and never raise: a frame whose marker matches a format but whose
length does not (truncated, zero-length, overlong) is counted in `Decoder.decode_errors` and the
advert is dropped. Nothing about a dropped advert is logged.
"""

from __future__ import annotations

import dataclasses
from collections import OrderedDict
from collections.abc import Callable, Sequence
from typing import TYPE_CHECKING

from listenpost.core.identity import altbeacon_id, eddystone_id, ibeacon_id, mac_id, rule_prefix
from listenpost.core.records import Advert, Reading, Telemetry, uuid16_to_128
from listenpost.core.settings import DecodeRule

if TYPE_CHECKING:
    from listenpost.agent.pipeline.filter import TagFilter

APPLE_COMPANY_ID = 0x004C
"""Company ID under which iBeacon-format frames are sent."""
IBEACON_MARKER = b"\x02\x15"
"""iBeacon sub-type 0x02 and its length 0x15 (21 bytes follow)."""
ALTBEACON_CODE = b"\xbe\xac"
"""AltBeacon "beacon code" (AltBeacon Protocol Specification v1.0)."""
EDDYSTONE_UUID = uuid16_to_128(0xFEAA)
"""Eddystone service UUID 0xFEAA in the 128-bit text form `Advert.service_data` is keyed by."""

_IBEACON_LEN = 23
_ALTBEACON_LEN = 24
_EDDY_UID_LENS = (18, 20)
_EDDY_TLM_LEN = 14
_FRAME_UID = 0x00
_FRAME_TLM = 0x20
_TLM_TEMP_NA = b"\x80\x00"
DEFAULT_TLM_MEMORY = 4096
"""Addresses remembered for TLM association (least recently seen forgotten first)."""


def _reading_factory() -> Callable[..., Reading]:
    """
    A constructor for `Reading` that skips the frozen dataclass ``__init__``.

    A frozen dataclass sets each field through ``object.__setattr__``; calling the slot descriptors
    directly builds the identical object in about half the time, and readings are made once or twice
    per advertisement heard. Used only while `Reading` is exactly the plain four-field record it is
    now; any change to it (a new field, a ``__post_init__``) falls back to the real constructor.
    """
    names = tuple(f.name for f in dataclasses.fields(Reading))
    if names != ("tag", "t_mono_ns", "rssi_dbm", "telemetry") or hasattr(Reading, "__post_init__"):
        return Reading
    new = object.__new__
    set_tag, set_t, set_rssi, set_tel = (getattr(Reading, n).__set__ for n in names)

    def make(tag: str, t_mono_ns: int, rssi_dbm: float, telemetry: Telemetry | None = None) -> Reading:
        r = new(Reading)
        set_tag(r, tag)
        set_t(r, t_mono_ns)
        set_rssi(r, rssi_dbm)
        set_tel(r, telemetry)
        return r

    return make


make_reading = _reading_factory()
"""``make_reading(tag, t_mono_ns, rssi_dbm, telemetry=None)``: a `Reading`, built fast (see `_reading_factory`)."""


class _Rule:
    """A `DecodeRule` with its lookups precomputed."""

    __slots__ = ("name", "company_id", "service_uuid", "prefix", "start", "end", "id_prefix")

    def __init__(self, rule: DecodeRule) -> None:
        self.name = rule.name
        self.company_id = rule.company_id
        self.service_uuid = uuid16_to_128(rule.service_uuid16) if rule.service_uuid16 is not None else None
        self.prefix = rule.prefix
        self.start = rule.offset
        self.end = rule.offset + rule.length
        self.id_prefix = rule_prefix(rule.name)


def parse_tlm(p: bytes) -> Telemetry:
    """
    Decode a plain Eddystone-TLM frame (service data after the UUID, frame byte first, 14 bytes).

    VBATT 0 means "not reported"; TEMP is signed 8.8 fixed point °C with 0x8000 meaning "not
    reported"; SEC_CNT counts 0.1 s (google/eddystone eddystone-tlm/tlm-plain.md).

    Raises:
        ValueError: ``p`` is not a 14-byte plain TLM frame.
    """
    if len(p) != _EDDY_TLM_LEN or p[0] & 0xF0 != _FRAME_TLM or p[1] != 0:
        raise ValueError(f"not a 14-byte plain Eddystone-TLM frame: {len(p)} bytes")
    batt = (p[2] << 8) | p[3]
    temp = p[4:6]
    return Telemetry(
        battery_mv=batt or None,
        temperature_c=None if temp == _TLM_TEMP_NA else int.from_bytes(temp, "big", signed=True) / 256,
        adv_count=int.from_bytes(p[6:10], "big"),
        uptime_s=int.from_bytes(p[10:14], "big") / 10,
    )


class Decoder:
    """
    Turn an `Advert` into a `Reading` of its tag identity, or ``None``.

    Args:
        rules: configured rules for other tag firmware, tried in order after the built-in formats.
        registry: the pipeline's `TagFilter`; see the module docstring for what it changes.
        tlm_memory: how many addresses to remember for Eddystone-TLM association.

    Counters (aggregate only; the heartbeat reports them):
        decoded: adverts that became a reading (with a registry: of a registered tag).
        unregistered: adverts whose identity was recognised but is not registered (with a registry only;
            without one, such readings are returned and the filter drops them).
        decode_errors: adverts dropped because a frame broke its format's layout.
        no_identity: adverts that named no tag (and, with a registry, whose address is not registered).
        tlm_unmatched: TLM frames from an address with no recently seen (registered) Eddystone-UID.
        telemetry: readings that carry TLM telemetry.
    """

    __slots__ = (
        "_rules",
        "_registry",
        "_eddy_by_addr",
        "_tlm_memory",
        "decoded",
        "unregistered",
        "decode_errors",
        "no_identity",
        "tlm_unmatched",
        "telemetry",
    )

    def __init__(
        self,
        rules: Sequence[DecodeRule] = (),
        *,
        registry: TagFilter | None = None,
        tlm_memory: int = DEFAULT_TLM_MEMORY,
    ) -> None:
        if tlm_memory < 1:
            raise ValueError(f"tlm_memory: must be >= 1, got {tlm_memory}")
        self._rules = tuple(_Rule(r) for r in rules)
        self._registry = registry
        self._eddy_by_addr: OrderedDict[str, str] = OrderedDict()
        self._tlm_memory = tlm_memory
        self.decoded = 0
        self.unregistered = 0
        self.decode_errors = 0
        self.no_identity = 0
        self.tlm_unmatched = 0
        self.telemetry = 0

    def __call__(self, advert: Advert) -> Reading | None:
        # One flat function: this runs for every advertisement the radio hears, so the common
        # paths avoid extra calls and allocations. With a registry, recognised identities are looked
        # up by their raw bytes, so an unregistered tag is dropped without ever being formatted.
        snap = self._registry._reg if self._registry is not None else None  # the property, minus a call
        if snap is not None:
            tag = snap.mac_tags.get(advert.address)
            if tag is not None:
                self.decoded += 1
                return make_reading(tag, advert.t_mono_ns, advert.rssi_dbm)
        md = advert.manufacturer_data
        if md:
            p = md.get(APPLE_COMPANY_ID)
            if p is not None and p[:2] == IBEACON_MARKER:
                if len(p) != _IBEACON_LEN:
                    return self._malformed()
                if snap is None:
                    tag = ibeacon_id(p[2:18], (p[18] << 8) | p[19], (p[20] << 8) | p[21])
                elif (tag := snap.ibeacon.get(p[2:22])) is None:
                    return self._unregistered()
                self.decoded += 1
                return make_reading(tag, advert.t_mono_ns, advert.rssi_dbm)
            for p in md.values():
                if p[:2] == ALTBEACON_CODE:
                    if len(p) != _ALTBEACON_LEN:
                        return self._malformed()
                    if snap is None:
                        tag = altbeacon_id(p[2:22])
                    elif (tag := snap.altbeacon.get(p[2:22])) is None:
                        return self._unregistered()
                    self.decoded += 1
                    return make_reading(tag, advert.t_mono_ns, advert.rssi_dbm)
        sd = advert.service_data
        if sd:
            p = sd.get(EDDYSTONE_UUID)
            if p is not None:
                if not p:
                    return self._malformed()
                frame = p[0] & 0xF0
                if frame == _FRAME_UID:
                    if len(p) not in _EDDY_UID_LENS:
                        return self._malformed()
                    if snap is None:
                        tag = eddystone_id(p[2:12], p[12:18])
                    elif (tag := snap.eddystone.get(p[2:18])) is None:
                        # This address now names an unregistered tag: its TLM frames are not ours any more.
                        self._eddy_by_addr.pop(advert.address, None)
                        return self._unregistered()
                    # Only recognised, registered tags are remembered: an unregistered device
                    # leaves no trace, even in memory.
                    self._remember(advert.address, tag)
                    self.decoded += 1
                    return make_reading(tag, advert.t_mono_ns, advert.rssi_dbm)
                if frame == _FRAME_TLM:
                    if len(p) < 2:
                        return self._malformed()
                    if p[1] == 0:  # version 0 = plain; 1 = encrypted (eTLM), which only its owner can read
                        if len(p) != _EDDY_TLM_LEN:
                            return self._malformed()
                        tag = self._eddy_by_addr.get(advert.address)
                        if tag is None:
                            self.tlm_unmatched += 1
                            return None
                        self.decoded += 1
                        self.telemetry += 1
                        return make_reading(tag, advert.t_mono_ns, advert.rssi_dbm, parse_tlm(p))
        for rule in self._rules:
            p = md.get(rule.company_id) if rule.company_id is not None else sd.get(rule.service_uuid)  # type: ignore[arg-type]
            if p is not None and p.startswith(rule.prefix):
                if len(p) < rule.end:
                    return self._malformed()
                key = p[rule.start : rule.end]
                if snap is None:
                    tag = rule.id_prefix + key.hex()
                else:
                    table = snap.rules.get(rule.name)
                    if table is None or (tag := table.get(key)) is None:
                        return self._unregistered()
                self.decoded += 1
                return make_reading(tag, advert.t_mono_ns, advert.rssi_dbm)
        if snap is not None:
            self.no_identity += 1
            return None
        try:
            tag = mac_id(advert.address)
        except ValueError:
            return self._malformed()
        self.decoded += 1
        return make_reading(tag, advert.t_mono_ns, advert.rssi_dbm)

    def _malformed(self) -> None:
        self.decode_errors += 1

    def _unregistered(self) -> None:
        self.unregistered += 1

    def _remember(self, address: str, tag: str) -> None:
        m = self._eddy_by_addr
        if m.get(address) == tag:
            m.move_to_end(address)
            return
        m[address] = tag
        m.move_to_end(address)
        if len(m) > self._tlm_memory:
            m.popitem(last=False)

    def stats(self) -> dict[str, int]:
        """The counters as a dict (names as in the class docstring)."""
        return {
            "decoded": self.decoded,
            "unregistered": self.unregistered,
            "decode_errors": self.decode_errors,
            "no_identity": self.no_identity,
            "tlm_unmatched": self.tlm_unmatched,
            "telemetry": self.telemetry,
        }
