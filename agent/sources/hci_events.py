"""
HCI LE advertising report events → `HciReport`, and the reverse for writing captures.

An HCI event is ``[event_code:1][param_len:1][params]`` (Core Specification Vol 4, Part E, §5.4.4);
on UART transports, raw HCI sockets and btsnoop datalink 1002 an indicator byte 0x04 comes first.
LE Meta (0x3E) carries a subevent code as its first parameter; we read

* 0x02 LE Advertising Report (§7.7.65.2) and
* 0x0D LE Extended Advertising Report (§7.7.65.13).

Reports inside one event are read one after the other, each complete (as the Linux kernel, btmon
and scapy do). Every other event gives ``[]``. Malformed events raise `DecodeError` with what was
wrong: Num_Reports 0, a field or data running past the end, legacy Data_Length over 31, or bytes
left over after the last report (a sign the event was framed wrong).

Extended data that does not fit one event comes as several reports with data status 1
("incomplete, more to come"). `parse_event` stays stateless and returns each fragment as it is;
`ExtendedReassembler` joins fragments of one advertiser and hands out the whole advertisement.
"""

from __future__ import annotations

import enum
import struct
from collections.abc import Iterable, Sequence
from dataclasses import dataclass

from listenpost.agent.sources.adstruct import build_ad, parse_ad
from listenpost.core.errors import DecodeError
from listenpost.core.records import Advert

EVT_LE_META = 0x3E
SUBEVT_ADV_REPORT = 0x02
SUBEVT_EXT_ADV_REPORT = 0x0D
H4_EVENT = 0x04
RSSI_UNAVAILABLE = 127
TX_POWER_UNAVAILABLE = 127
LEGACY_MAX_DATA = 31


class LegacyEventType(enum.IntEnum):
    """Event_Type of an LE Advertising Report (subevent 0x02)."""

    ADV_IND = 0
    """Connectable, scannable, undirected."""
    ADV_DIRECT_IND = 1
    """Connectable, directed."""
    ADV_SCAN_IND = 2
    """Scannable, undirected."""
    ADV_NONCONN_IND = 3
    """Non-connectable, non-scannable: what most beacons send."""
    SCAN_RSP = 4
    """Scan response."""


class DataStatus(enum.IntEnum):
    """Bits 5-6 of an extended report's Event_Type."""

    COMPLETE = 0
    """All data of the advertisement is in this report (or the reports before it)."""
    INCOMPLETE = 1
    """More data follows in the next report."""
    TRUNCATED = 2
    """Data ends here, cut short; no more will come."""


@dataclass(frozen=True, slots=True)
class HciReport:
    """One advertising report as the controller delivered it."""

    event_type: int
    """Legacy: `LegacyEventType`; extended: the 16-bit bit field (bit 4 legacy PDU, bits 5-6 data status)."""
    address_type: int
    """0 public, 1 random, 2 public identity, 3 random static identity, 0xFF anonymous (extended)."""
    address: str
    """Advertiser address, upper-case colon form in display order (the wire order is reversed)."""
    rssi: int | None
    """dBm; ``None`` when the controller said 127 (not available)."""
    data: bytes
    """Advertising data (AD structures)."""
    tx_power: int | None = None
    """Extended only: TX power in dBm; ``None`` when 127 (not available) and for legacy reports."""
    data_status: DataStatus | None = None
    """Extended only: whether this report's data is complete."""
    sid: int | None = None
    """Extended only: Advertising_SID (0xFF: none)."""
    extended: bool = False
    """True if it came in an LE Extended Advertising Report."""


def _addr(le6: bytes) -> str:
    return ":".join(f"{b:02X}" for b in reversed(le6))


def _int8(b: int) -> int:
    return b - 256 if b >= 128 else b


def parse_event(code: int, params: bytes) -> list[HciReport]:
    """
    Decode one HCI event.

    Args:
        code: event code (0x3E for LE Meta).
        params: event parameters, after the code and length bytes.

    Returns:
        The advertising reports in it; ``[]`` for any other event.

    Raises:
        DecodeError: the event claims to be an advertising report but its bytes do not add up.
    """
    if code != EVT_LE_META:
        return []
    if not params:
        raise DecodeError("LE Meta event without a subevent code")
    sub = params[0]
    if sub == SUBEVT_ADV_REPORT:
        return _legacy(params)
    if sub == SUBEVT_EXT_ADV_REPORT:
        return _extended(params)
    return []


def _count(params: bytes, what: str) -> int:
    if len(params) < 2:
        raise DecodeError(f"{what}: Num_Reports missing")
    n = params[1]
    if n == 0:
        raise DecodeError(f"{what}: Num_Reports is 0")
    return n


def _legacy(p: bytes) -> list[HciReport]:
    n = _count(p, "LE Advertising Report")
    out: list[HciReport] = []
    i = 2
    for k in range(n):
        if i + 9 > len(p):
            raise DecodeError(
                f"LE Advertising Report {k}: header needs 9 bytes at offset {i}, event has {len(p)}"
            )
        evt, atype = p[i], p[i + 1]
        addr = _addr(p[i + 2 : i + 8])
        dlen = p[i + 8]
        if dlen > LEGACY_MAX_DATA:
            raise DecodeError(f"LE Advertising Report {k}: Data_Length {dlen} > {LEGACY_MAX_DATA}")
        j = i + 9 + dlen
        if j + 1 > len(p):
            raise DecodeError(
                f"LE Advertising Report {k}: data and RSSI run past the end ({j + 1} > {len(p)})"
            )
        rssi = _int8(p[j])
        out.append(
            HciReport(evt, atype, addr, None if rssi == RSSI_UNAVAILABLE else rssi, bytes(p[i + 9 : j]))
        )
        i = j + 1
    if i != len(p):
        raise DecodeError(f"LE Advertising Report: {len(p) - i} bytes left after {n} reports")
    return out


_EXT_FIXED = struct.Struct("<HB6sBBBbbHB6sB")  # 24 bytes before the data


def _extended(p: bytes) -> list[HciReport]:
    n = _count(p, "LE Extended Advertising Report")
    out: list[HciReport] = []
    i = 2
    for k in range(n):
        if i + _EXT_FIXED.size > len(p):
            raise DecodeError(
                f"LE Extended Advertising Report {k}: header needs {_EXT_FIXED.size} bytes "
                f"at offset {i}, event has {len(p)}"
            )
        (evt, atype, addr, _pphy, _sphy, sid, tx, rssi, _interval, _datype, _daddr, dlen) = (
            _EXT_FIXED.unpack_from(p, i)
        )
        j = i + _EXT_FIXED.size + dlen
        if j > len(p):
            raise DecodeError(f"LE Extended Advertising Report {k}: data runs past the end ({j} > {len(p)})")
        status = (evt >> 5) & 0x3
        if status == 3:
            raise DecodeError(f"LE Extended Advertising Report {k}: data status 3 is reserved")
        out.append(
            HciReport(
                evt,
                atype,
                _addr(addr),
                None if rssi == RSSI_UNAVAILABLE else rssi,
                bytes(p[i + _EXT_FIXED.size : j]),
                None if tx == TX_POWER_UNAVAILABLE else tx,
                DataStatus(status),
                sid,
                True,
            )
        )
        i = j
    if i != len(p):
        raise DecodeError(f"LE Extended Advertising Report: {len(p) - i} bytes left after {n} reports")
    return out


def parse_h4(packet: bytes) -> list[HciReport]:
    """
    Decode an H4 packet (raw HCI socket ``recv``, btsnoop datalink 1002): indicator, code, length, params.

    Non-event packets give ``[]``.

    Raises:
        DecodeError: a short packet, a length byte that disagrees with the packet, or a bad report.
    """
    if not packet or packet[0] != H4_EVENT:
        return []
    return parse_event_packet(packet[1:])


def parse_event_packet(event: bytes) -> list[HciReport]:
    """
    Decode ``[code][param_len][params]`` (btsnoop datalink 2001 event records).

    Raises:
        DecodeError: a short packet, a length byte that disagrees with the packet, or a bad report.
    """
    if len(event) < 2:
        raise DecodeError(f"HCI event of {len(event)} bytes is shorter than its 2-byte header")
    if event[1] != len(event) - 2:
        raise DecodeError(
            f"HCI event 0x{event[0]:02x}: Parameter_Total_Length {event[1]} but {len(event) - 2} bytes follow"
        )
    return parse_event(event[0], event[2:])


# ---------------------------------------------------------------- reassembly


class ExtendedReassembler:
    """
    Join extended-report fragments (data status 1) of one advertiser into one report.

    Fragments are keyed by (address, address type, SID). A complete report (status 0) closes the
    advertisement; a truncated one (status 2) closes it too, and the result keeps
    ``DataStatus.TRUNCATED`` so a caller can tell. The header fields (RSSI, TX power) are the
    first fragment's. Pending advertisements are bounded in count and in size (1650 bytes, the
    largest extended advertising data) so a controller that never sends the last fragment
    cannot grow memory.
    """

    __slots__ = ("_pending", "max_pending", "dropped")

    MAX_DATA = 1650

    def __init__(self, max_pending: int = 64) -> None:
        self._pending: dict[tuple[str, int, int | None], HciReport] = {}
        self.max_pending = max_pending
        self.dropped = 0
        """Fragments given up: over the size limit, or evicted by newer advertisers."""

    def feed(self, rep: HciReport) -> HciReport | None:
        """Return the whole advertisement when ``rep`` completes one, else ``None``."""
        if not rep.extended:
            return rep
        key = (rep.address, rep.address_type, rep.sid)
        first = self._pending.pop(key, None)
        if first is not None:
            if len(first.data) + len(rep.data) > self.MAX_DATA:
                self.dropped += 1
                return None
            rep = HciReport(
                first.event_type,
                first.address_type,
                first.address,
                first.rssi,
                first.data + rep.data,
                first.tx_power,
                rep.data_status,
                first.sid,
                True,
            )
        if rep.data_status is DataStatus.INCOMPLETE:
            if len(self._pending) >= self.max_pending:
                self._pending.pop(next(iter(self._pending)))
                self.dropped += 1
            self._pending[key] = rep
            return None
        return rep


# ---------------------------------------------------------------- Advert


def report_to_advert(rep: HciReport, t_mono_ns: int, platform_data: object = None) -> Advert | None:
    """
    Turn a report into an `Advert`; ``None`` when the controller gave no RSSI (nothing to measure).
    """
    if rep.rssi is None:
        return None
    f = parse_ad(rep.data)
    # Advert.tx_power_dbm is the TX Power Level AD value; the extended report's own TX_Power
    # field stays in HciReport (it is the controller's view, not the tag's claim).
    return Advert(
        t_mono_ns,
        rep.address,
        rep.address_type,
        rep.rssi,
        f.tx_power_dbm,
        f.manufacturer_data,
        f.service_data,
        f.service_uuids,
        f.local_name,
        platform_data,
    )


def _addr_le(address: str) -> bytes:
    parts = address.split(":")
    if len(parts) != 6:
        raise ValueError(f"address must have 6 colon-separated bytes, got {address!r}")
    return bytes(int(x, 16) for x in reversed(parts))


def build_adv_report_event(reports: Sequence[tuple[int, int, str, bytes, int]]) -> bytes:
    """
    An LE Advertising Report event ``[0x3E][len][0x02][n]…`` (no H4 indicator).

    Args:
        reports: (event_type, address_type, address, AD data ≤31 bytes, RSSI dBm or 127).
    """
    body = bytearray((SUBEVT_ADV_REPORT, len(reports)))
    for evt, atype, address, data, rssi in reports:
        if len(data) > LEGACY_MAX_DATA:
            raise ValueError(f"legacy advertising data is at most 31 bytes, got {len(data)}")
        body += bytes((evt, atype)) + _addr_le(address) + bytes((len(data),)) + data + bytes((rssi & 0xFF,))
    return _event(body)


def build_ext_adv_report_event(
    reports: Iterable[tuple[int, int, str, bytes, int, int]],
    *,
    sid: int = 0xFF,
    primary_phy: int = 1,
    secondary_phy: int = 0,
) -> bytes:
    """
    An LE Extended Advertising Report event (no H4 indicator).

    Args:
        reports: (event_type bit field, address_type, address, data, RSSI dBm or 127, TX power dBm or 127).
    """
    reps = list(reports)
    body = bytearray((SUBEVT_EXT_ADV_REPORT, len(reps)))
    for evt, atype, address, data, rssi, tx in reps:
        body += (
            _EXT_FIXED.pack(
                evt,
                atype,
                _addr_le(address),
                primary_phy,
                secondary_phy,
                sid,
                _int8(tx & 0xFF),
                _int8(rssi & 0xFF),
                0,
                0,
                b"\0" * 6,
                len(data),
            )
            + data
        )
    return _event(body)


def _event(params: bytes | bytearray) -> bytes:
    if len(params) > 255:
        raise ValueError(f"event parameters are at most 255 bytes, got {len(params)}")
    return bytes((EVT_LE_META, len(params))) + bytes(params)


def advert_to_event(
    advert: Advert, *, event_type: int = LegacyEventType.ADV_NONCONN_IND, flags: int | None = 0x06
) -> bytes:
    """
    The HCI event a controller would have sent for ``advert`` (no H4 indicator): a legacy
    LE Advertising Report when the AD data fits 31 bytes, else an extended report with the
    legacy bit clear (up to 229 data bytes in one event).
    """
    ad = build_ad(
        flags=flags,
        manufacturer_data=advert.manufacturer_data,
        service_data=advert.service_data,
        service_uuids=advert.service_uuids,
        tx_power_dbm=advert.tx_power_dbm,
        local_name=advert.local_name,
    )
    if len(ad) <= LEGACY_MAX_DATA:
        return build_adv_report_event(
            [(event_type, advert.address_type, advert.address, ad, advert.rssi_dbm)]
        )
    if len(ad) > 255 - 2 - _EXT_FIXED.size:
        raise ValueError(f"advertising data of {len(ad)} bytes does not fit one event")
    tx = advert.tx_power_dbm if advert.tx_power_dbm is not None else TX_POWER_UNAVAILABLE
    return build_ext_adv_report_event(
        [(0x0000, advert.address_type, advert.address, ad, advert.rssi_dbm, tx)]
    )
