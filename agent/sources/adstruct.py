"""
Bluetooth advertising data (AD structures) → fields, and back.

Advertising and scan response data are a run of ``[len:1][type:1][data:len-1]`` structures
(Core Specification Vol 3, Part C, §11; data types in the Core Specification Supplement, Part A).
Multi-byte values are little-endian; 128-bit UUIDs are sent byte-reversed.

`parse_ad` never raises on bytes off the air. Each edge case is a deliberate choice, and
most agree with bluetooth-data-tools (the parser bleak's ecosystem uses), so a tag reads the
same whichever source heard it:

=============================  ==========================================  =====================
input                          what we do                                  bluetooth-data-tools
=============================  ==========================================  =====================
``len`` = 0                    padding: skip the byte and go on            same
                               (the spec calls it the end of the
                               significant part, but adapters concatenate
                               padded advertising + scan response blocks)
type 0x00 or unknown type      ignored, not an error                       same
``len`` runs past the end      ``errors`` += 1, stop (no way to resync)    dropped, stops
type-only (``len`` = 1)        ``errors`` += 1 for types that need data;   dropped
                               an empty name or UUID list is ignored
lone length byte at the end    ``errors`` += 1                             ignored
TX power not exactly 1 byte    ``errors`` += 1, ignored                    ignored
manufacturer / service data    ``errors`` += 1, ignored                    ignored
shorter than its ID or UUID
UUID list with a partial       whole UUIDs kept, ``errors`` += 1           whole UUIDs kept
trailing UUID
same company ID / service      last one wins                               same
UUID twice
shortened and complete name    complete wins in either order; of two       same
                               shortened names the first, of two
                               complete names the last
name bytes not UTF-8           decoded with U+FFFD replacements            same
flags                          reported (little-endian int of the data)    not reported
=============================  ==========================================  =====================
"""

from __future__ import annotations

import enum
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field

from listenpost.core.records import BASE_UUID_SUFFIX


class AdType(enum.IntEnum):
    """The AD types this module reads or writes (Bluetooth SIG Assigned Numbers, common data types)."""

    FLAGS = 0x01
    UUID16_INCOMPLETE = 0x02
    UUID16_COMPLETE = 0x03
    UUID32_INCOMPLETE = 0x04
    UUID32_COMPLETE = 0x05
    UUID128_INCOMPLETE = 0x06
    UUID128_COMPLETE = 0x07
    SHORT_NAME = 0x08
    COMPLETE_NAME = 0x09
    TX_POWER = 0x0A
    SERVICE_DATA_16 = 0x16
    SERVICE_DATA_32 = 0x20
    SERVICE_DATA_128 = 0x21
    MANUFACTURER = 0xFF


@dataclass(frozen=True, slots=True)
class AdFields:
    """What one block of advertising data said."""

    manufacturer_data: dict[int, bytes] = field(default_factory=dict)
    """Manufacturer Specific Data by company ID; value without the 2 ID bytes."""
    service_data: dict[str, bytes] = field(default_factory=dict)
    """Service Data by 128-bit lower-case UUID text; value without the UUID bytes."""
    service_uuids: tuple[str, ...] = ()
    """Service UUIDs (16/32/128-bit lists), 128-bit lower-case text, in order of appearance."""
    tx_power_dbm: int | None = None
    """TX Power Level, dBm (int8)."""
    local_name: str | None = None
    """Complete local name, else the shortened one."""
    flags: int | None = None
    """Flags AD value (bit 0 LE Limited, bit 1 LE General Discoverable, bit 2 BR/EDR not supported)."""
    errors: int = 0
    """Count of malformed structures seen (skipped)."""


_UUID_SUFFIX = BASE_UUID_SUFFIX
_uuid16_cache: dict[int, str] = {}


def _uuid16(v: int) -> str:
    s = _uuid16_cache.get(v)
    if s is None:
        s = _uuid16_cache[v] = f"0000{v:04x}{_UUID_SUFFIX}"
    return s


def _uuid32(v: int) -> str:
    return f"{v:08x}{_UUID_SUFFIX}"


def _uuid128(le: bytes) -> str:
    h = le[::-1].hex()
    return f"{h[:8]}-{h[8:12]}-{h[12:16]}-{h[16:20]}-{h[20:]}"


# plain int keys: the parse loop looks raw type bytes up here
_UUID_WIDTH: dict[int, int] = {0x02: 2, 0x03: 2, 0x04: 4, 0x05: 4, 0x06: 16, 0x07: 16}
_SVC_WIDTH: dict[int, int] = {0x16: 2, 0x20: 4, 0x21: 16}


def _uuid_from_le(b: bytes) -> str:
    n = len(b)
    if n == 2:
        return _uuid16(b[0] | b[1] << 8)
    if n == 4:
        return _uuid32(int.from_bytes(b, "little"))
    return _uuid128(b)


def parse_ad(data: bytes) -> AdFields:
    """
    Parse advertising (or scan response) data. Never raises; see the module docstring for edge cases.

    Args:
        data: the AD bytes of one report (up to 31 bytes legacy, 1650 extended).

    Returns:
        The fields found; ``errors`` counts malformed structures that were skipped.
    """
    mfg: dict[int, bytes] = {}
    svc: dict[str, bytes] = {}
    uuids: list[str] = []
    tx: int | None = None
    name: str | None = None
    flags: int | None = None
    errors = 0
    n = len(data)
    i = 0
    while i < n:
        length = data[i]
        if length == 0:
            i += 1
            continue
        if i + 1 >= n:  # a length byte with nothing after it
            errors += 1
            break
        end = i + 1 + length
        if end > n:  # structure runs past the end: the rest cannot be framed
            errors += 1
            break
        typ = data[i + 1]
        body = data[i + 2 : end]
        i = end
        if typ == 0xFF:
            if len(body) < 2:
                errors += 1
            else:
                mfg[body[0] | body[1] << 8] = bytes(body[2:])
        elif typ == 0x01:
            if body:
                flags = int.from_bytes(body, "little")
            else:
                errors += 1
        elif typ == 0x0A:
            if len(body) == 1:
                tx = body[0] - 256 if body[0] >= 128 else body[0]
            else:
                errors += 1
        elif typ == 0x09 or typ == 0x08:
            if not body:
                continue  # an empty name says nothing
            if typ == 0x09:
                name = body.decode("utf-8", "replace")
            elif name is None:
                name = body.decode("utf-8", "replace")
        elif typ in _SVC_WIDTH:
            w = _SVC_WIDTH[typ]
            if len(body) < w:
                errors += 1
            else:
                svc[_uuid_from_le(body[:w])] = bytes(body[w:])
        elif typ in _UUID_WIDTH:
            w = _UUID_WIDTH[typ]
            whole = len(body) - len(body) % w
            if whole != len(body):
                errors += 1
            uuids.extend(_uuid_from_le(body[k : k + w]) for k in range(0, whole, w))
    return AdFields(mfg, svc, tuple(uuids), tx, name, flags, errors)


# ---------------------------------------------------------------- writing


def ad_structure(ad_type: int, data: bytes) -> bytes:
    """
    One AD structure ``[len][type][data]``.

    Raises:
        ValueError: if ``ad_type`` is not a byte or ``data`` is longer than 254 bytes.
    """
    if not 0 <= ad_type <= 0xFF:
        raise ValueError(f"ad_type must be 0..255, got {ad_type!r}")
    if len(data) > 254:
        raise ValueError(f"AD data must be at most 254 bytes, got {len(data)}")
    return bytes((len(data) + 1, ad_type)) + bytes(data)


def uuid_to_le(uuid: str) -> bytes:
    """
    The shortest over-the-air form of a UUID: 2 bytes for Bluetooth Base UUIDs ``0000xxxx-…``,
    4 bytes for ``xxxxxxxx-…`` on the base, else 16 bytes; little-endian.

    Accepts ``"180f"``-style 4-hex text as well as 128-bit text.

    Raises:
        ValueError: if the text is not a UUID.
    """
    u = uuid.lower()
    try:
        if len(u) == 4:
            return int(u, 16).to_bytes(2, "little")
        if len(u) == 36 and [len(p) for p in u.split("-")] == [8, 4, 4, 4, 12]:
            if u.endswith(_UUID_SUFFIX):
                v = int(u[:8], 16)
                return v.to_bytes(2, "little") if v <= 0xFFFF else v.to_bytes(4, "little")
            return bytes.fromhex(u.replace("-", ""))[::-1]
    except ValueError:
        pass
    raise ValueError(f"not a UUID: {uuid!r}")


def build_ad(
    *,
    flags: int | None = None,
    manufacturer_data: Mapping[int, bytes] | None = None,
    service_data: Mapping[str, bytes] | None = None,
    service_uuids: Iterable[str] = (),
    tx_power_dbm: int | None = None,
    local_name: str | None = None,
) -> bytes:
    """
    Advertising data carrying the given fields (flags, UUID lists, TX power, service data,
    manufacturer data, complete name — in that order). The inverse of `parse_ad` for well-formed data.

    Service UUIDs are grouped into complete lists by width; UUIDs are written in their shortest form.
    """
    out = bytearray()
    if flags is not None:
        out += ad_structure(AdType.FLAGS, bytes((flags,)))
    by_width: dict[int, bytearray] = {}
    for u in service_uuids:
        le = uuid_to_le(u)
        by_width.setdefault(len(le), bytearray()).extend(le)
    for width, typ in (
        (2, AdType.UUID16_COMPLETE),
        (4, AdType.UUID32_COMPLETE),
        (16, AdType.UUID128_COMPLETE),
    ):
        if width in by_width:
            out += ad_structure(typ, bytes(by_width[width]))
    if tx_power_dbm is not None:
        out += ad_structure(AdType.TX_POWER, (tx_power_dbm & 0xFF).to_bytes(1, "little"))
    for u, payload in (service_data or {}).items():
        le = uuid_to_le(u)
        typ = {2: AdType.SERVICE_DATA_16, 4: AdType.SERVICE_DATA_32, 16: AdType.SERVICE_DATA_128}[len(le)]
        out += ad_structure(typ, le + bytes(payload))
    for company, payload in (manufacturer_data or {}).items():
        out += ad_structure(AdType.MANUFACTURER, company.to_bytes(2, "little") + bytes(payload))
    if local_name is not None:
        out += ad_structure(AdType.COMPLETE_NAME, local_name.encode())
    return bytes(out)
