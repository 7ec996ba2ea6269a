"""HCI LE advertising report decoding, checked against scapy 2.8 (builder and decoder) and docs/references.md §2 vectors."""

from __future__ import annotations

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scapy.layers.bluetooth import (
    EIR_Hdr,
    HCI_Event_Hdr,
    HCI_Event_LE_Meta,
    HCI_Hdr,
    HCI_LE_Meta_Advertising_Report,
    HCI_LE_Meta_Advertising_Reports,
    HCI_LE_Meta_Extended_Advertising_Report,
    HCI_LE_Meta_Extended_Advertising_Reports,
)

from listenpost.agent.sources.adstruct import build_ad
from listenpost.agent.sources.hci_events import (
    DataStatus,
    ExtendedReassembler,
    HciReport,
    advert_to_event,
    build_adv_report_event,
    build_ext_adv_report_event,
    parse_event,
    parse_event_packet,
    parse_h4,
    report_to_advert,
)
from listenpost.core.errors import DecodeError
from listenpost.core.records import Advert

# docs/references.md §2 test vectors [RUN: decoded identically by scapy 2.8.0 and BlueZ btmon 5.66]
LEGACY = bytes.fromhex("043e13020103015544332211c00702010603097431c4")
EXTENDED = bytes.fromhex("043e210d011000015544332211c00100ff7fb80000000000000000000702010603097431")


def test_legacy_vector():
    """ADV_NONCONN_IND, random C0:11:22:33:44:55, flags 06 + name "t1", RSSI -60 (docs/references.md §2)."""
    (r,) = parse_h4(LEGACY)
    assert r == HciReport(3, 1, "C0:11:22:33:44:55", -60, bytes.fromhex("02010603097431"))


def test_legacy_rssi_127_means_unavailable():
    """RSSI 127 is "not available" (Core Spec Vol 4 Part E §7.7.65.2 [MEM]; scapy reads it as 127)."""
    (r,) = parse_h4(LEGACY[:-1] + b"\x7f")
    assert r.rssi is None
    assert report_to_advert(r, 0) is None


def test_extended_vector():
    """Extended report with the legacy bit, TX power n/a, RSSI -72 (docs/references.md §2)."""
    (r,) = parse_h4(EXTENDED)
    assert (
        r.event_type,
        r.address_type,
        r.address,
        r.rssi,
        r.tx_power,
        r.data_status,
        r.sid,
        r.extended,
    ) == (0x0010, 1, "C0:11:22:33:44:55", -72, None, DataStatus.COMPLETE, 0xFF, True)
    assert r.data == bytes.fromhex("02010603097431")


def test_builders_reproduce_the_vectors():
    """Our event builders write the same bytes scapy wrote for the reference vectors."""
    ad = bytes.fromhex("02010603097431")
    assert b"\x04" + build_adv_report_event([(3, 1, "C0:11:22:33:44:55", ad, -60)]) == LEGACY
    assert b"\x04" + build_ext_adv_report_event([(0x10, 1, "C0:11:22:33:44:55", ad, -72, 127)]) == EXTENDED


def test_other_events_give_nothing():
    """Command Complete, other LE subevents and non-event packets are not advertising reports."""
    assert parse_event(0x0E, b"\x01\x0c\x20\x00") == []
    assert parse_event(0x3E, b"\x01" + b"\x00" * 18) == []  # LE Connection Complete
    assert parse_h4(b"\x01\x0c\x20\x02\x01\x00") == []  # a command


@pytest.mark.parametrize(
    ("params", "match"),
    [
        (b"", "subevent"),
        (b"\x02", "Num_Reports missing"),
        (b"\x02\x00", "Num_Reports is 0"),
        (b"\x02\x01\x03\x01\x55\x44", "header needs 9 bytes"),
        (b"\x02\x01\x03\x01" + bytes(6) + b"\x20" + bytes(33), "Data_Length 32 > 31"),
        (b"\x02\x01\x03\x01" + bytes(6) + b"\x05\x02\x01", "run past the end"),
        (LEGACY[3:] + b"\x00", "1 bytes left"),
        (b"\x0d\x01" + bytes(10), "header needs 24 bytes"),
        (EXTENDED[3:-1], "data runs past the end"),
        (b"\x0d\x01\x60\x00" + EXTENDED[6:], "data status 3 is reserved"),
    ],
)
def test_malformed_events_raise_decode_error(params, match):
    """Each malformation gives DecodeError saying what is wrong."""
    with pytest.raises(DecodeError, match=match):
        parse_event(0x3E, params)


def test_length_byte_must_match():
    """The Parameter_Total_Length byte must agree with the packet."""
    with pytest.raises(DecodeError, match="Parameter_Total_Length"):
        parse_h4(LEGACY + b"\x00")
    with pytest.raises(DecodeError, match="shorter"):
        parse_event_packet(b"\x3e")


addresses = st.lists(st.integers(0, 255), min_size=6, max_size=6).map(
    lambda b: ":".join(f"{x:02x}" for x in b)
)
ad_structs = st.lists(st.tuples(st.integers(1, 255), st.binary(max_size=5)), max_size=4)


def _eirs(structs):
    return [EIR_Hdr(bytes((len(d) + 1, t)) + d) for t, d in structs]


@settings(max_examples=150, deadline=None)
@given(
    st.lists(
        st.tuples(st.integers(0, 4), st.integers(0, 3), addresses, ad_structs, st.integers(-127, 127)),
        min_size=1,
        max_size=3,
    )
)
def test_legacy_reports_built_by_scapy(reports):
    """Reports built by scapy decode field by field as scapy decodes them."""
    pkts = [
        HCI_LE_Meta_Advertising_Report(type=t, addr_type=at, addr=a, data=_eirs(s), rssi=r)
        for t, at, a, s, r in reports
    ]
    raw = bytes(
        HCI_Hdr() / HCI_Event_Hdr() / HCI_Event_LE_Meta() / HCI_LE_Meta_Advertising_Reports(reports=pkts)
    )
    if any(sum(len(d) + 2 for _, d in s) > 31 for *_, s, _r in reports):
        with pytest.raises(DecodeError):
            parse_h4(raw)
        return
    ours = parse_h4(raw)
    theirs = HCI_Hdr(raw)[HCI_LE_Meta_Advertising_Reports].reports
    assert len(ours) == len(theirs) == len(reports)
    for o, t in zip(ours, theirs, strict=True):
        assert (o.event_type, o.address_type, o.address.lower()) == (t.type, t.addr_type, t.addr)
        assert o.rssi == (None if t.rssi == 127 else t.rssi)
        assert len(o.data) == t.len
        assert o.data == b"".join(bytes(e) for e in t.data)


@settings(max_examples=150, deadline=None)
@given(
    st.lists(
        st.tuples(
            st.integers(0, 2),
            st.booleans(),
            st.integers(0, 3),
            addresses,
            ad_structs,
            st.integers(-127, 127),
            st.integers(-127, 127),
            st.integers(0, 15),
        ),
        min_size=1,
        max_size=3,
    )
)
def test_extended_reports_built_by_scapy(reports):
    """Extended reports built by scapy decode field by field as scapy decodes them."""
    pkts = [
        HCI_LE_Meta_Extended_Advertising_Report(
            data_status=ds,
            legacy=int(leg),
            connectable=1,
            addr_type=at,
            addr=a,
            primary_phy=1,
            secondary_phy=2,
            advertising_sid=sid,
            tx_power=tx & 0xFF,
            rssi=r,
            direct_addr="00:00:00:00:00:00",
            data=_eirs(s),
        )
        for ds, leg, at, a, s, r, tx, sid in reports
    ]
    raw = bytes(
        HCI_Hdr()
        / HCI_Event_Hdr()
        / HCI_Event_LE_Meta()
        / HCI_LE_Meta_Extended_Advertising_Reports(reports=pkts)
    )
    if len(raw) - 3 > 255:
        return  # does not fit one event
    ours = parse_h4(raw)
    theirs = HCI_Hdr(raw)[HCI_LE_Meta_Extended_Advertising_Reports].reports
    assert len(ours) == len(theirs) == len(reports)
    for o, t in zip(ours, theirs, strict=True):
        assert o.extended
        assert o.data_status == t.data_status
        assert bool(o.event_type & 0x10) == bool(t.legacy)
        assert (o.address_type, o.address.lower(), o.sid) == (t.addr_type, t.addr, t.advertising_sid)
        assert o.rssi == (None if t.rssi == 127 else t.rssi)
        # scapy 2.8 reads TX_Power as unsigned: fold to int8 before comparing
        tx = t.tx_power - 256 if t.tx_power >= 128 else t.tx_power
        assert o.tx_power == (None if tx == 127 else tx)
        assert o.data == b"".join(bytes(e) for e in t.data) and len(o.data) == t.data_length


@settings(max_examples=500, deadline=None)
@given(
    st.sampled_from([LEGACY, EXTENDED]),
    st.lists(st.tuples(st.integers(0, 60), st.integers(0, 255)), max_size=4),
    st.integers(0, 70),
)
def test_mutated_events_raise_only_decode_error(base, edits, cut):
    """Corrupted or cut events either decode or raise DecodeError, nothing else."""
    b = bytearray(base)
    for pos, val in edits:
        if pos < len(b):
            b[pos] = val
    b = b[: max(cut, 1)] if cut < len(b) else b
    try:
        parse_h4(bytes(b))
    except DecodeError:
        pass


@settings(max_examples=300, deadline=None)
@given(st.integers(0, 255), st.binary(max_size=80))
def test_random_params_raise_only_decode_error(code, params):
    """Random event parameters never raise anything but DecodeError."""
    try:
        parse_event(code, params)
        parse_event(0x3E, b"\x02" + params)
        parse_event(0x3E, b"\x0d" + params)
    except DecodeError:
        pass


def test_reassembler_joins_fragments():
    """Status-1 fragments are held and joined; the header is the first fragment's; status 2 stays marked."""
    big = build_ad(manufacturer_data={0xFFFF: bytes(range(200))})
    a, b = big[:120], big[120:]
    ev1 = build_ext_adv_report_event([(0x20, 1, "C0:11:22:33:44:55", a, -70, 127)], sid=2)
    ev2 = build_ext_adv_report_event([(0x00, 1, "C0:11:22:33:44:55", b, -71, 127)], sid=2)
    r = ExtendedReassembler()
    (f1,) = parse_event_packet(ev1)
    assert f1.data_status is DataStatus.INCOMPLETE
    assert r.feed(f1) is None
    whole = r.feed(parse_event_packet(ev2)[0])
    assert (
        whole is not None
        and whole.data == big
        and whole.rssi == -70
        and whole.data_status is DataStatus.COMPLETE
    )
    adv = report_to_advert(whole, 5)
    assert adv is not None and adv.manufacturer_data == {0xFFFF: bytes(range(200))}
    # truncated ends the advertisement too, marked
    r.feed(f1)
    ev3 = build_ext_adv_report_event([(0x40, 1, "C0:11:22:33:44:55", b"", -71, 127)], sid=2)
    t = r.feed(parse_event_packet(ev3)[0])
    assert t is not None and t.data == a and t.data_status is DataStatus.TRUNCATED


def test_reassembler_is_bounded():
    """A controller that never finishes cannot grow the pending set past its limit."""
    r = ExtendedReassembler(max_pending=4)
    for i in range(10):
        (rep,) = parse_event_packet(
            build_ext_adv_report_event([(0x20, 1, f"C0:11:22:33:44:{i:02X}", b"\x02\x01\x06", -70, 127)])
        )
        assert r.feed(rep) is None
    assert len(r._pending) == 4 and r.dropped == 6


def test_advert_to_event_round_trip():
    """An Advert written as an event reads back as the same Advert; long data uses the extended report."""
    a = Advert(
        7, "C4:7A:10:00:2B:91", 1, -67, None, {0x004C: bytes.fromhex("0215") + bytes(21)}, {}, (), None
    )
    ev = advert_to_event(a)
    assert ev[2] == 0x02
    assert report_to_advert(parse_event_packet(ev)[0], 7) == a
    long = Advert(9, "C4:7A:10:00:2B:91", 0, -80, None, {0xFFFF: bytes(40)}, {}, (), "visitor-tag")
    ev = advert_to_event(long)
    assert ev[2] == 0x0D
    assert report_to_advert(parse_event_packet(ev)[0], 9) == long


# ---------------------------------------------------------------- raw HCI source framing


async def _drain(src) -> list:
    return [a async for a in src.adverts()]


async def test_hci_source_reads_h4_packets_from_a_socket(clock):
    """One H4 packet per datagram, as a raw HCI socket delivers them (a SEQPACKET pair stands in for it)."""
    import asyncio
    import socket

    from listenpost.agent.sources.hci import HciSource

    ours, theirs = socket.socketpair(socket.AF_UNIX, socket.SOCK_SEQPACKET)
    for pkt in (LEGACY, b"\x04\x0e\x04\x01\x0c\x20\x00", LEGACY[:-3], LEGACY[:-1] + b"\x7f", EXTENDED):
        theirs.send(pkt)
    theirs.close()
    src = HciSource(0, clock, sock=ours)
    got = await asyncio.wait_for(_drain(src), 5)
    assert [(a.address, a.rssi_dbm, a.local_name, a.t_mono_ns) for a in got] == [
        ("C0:11:22:33:44:55", -60, "t1", 1000 * 10**9),
        ("C0:11:22:33:44:55", -72, "t1", 1000 * 10**9),
    ]
    assert src.stats() == {
        "packets": 5,
        "adverts": 2,
        "bad_packets": 1,
        "dropped_no_rssi": 1,
        "fragments_dropped": 0,
    }
    assert ours.fileno() == -1  # closed when the stream ended


async def test_hci_source_without_af_bluetooth(clock, monkeypatch):
    """A Python without AF_BLUETOOTH gives SourceUnavailable(NO_BLUETOOTH) with a message saying so."""
    import socket

    from listenpost.agent.sources.hci import HciSource, dev_id_of
    from listenpost.core.errors import SourceReason, SourceUnavailable

    monkeypatch.delattr(socket, "AF_BLUETOOTH", raising=False)
    with pytest.raises(SourceUnavailable, match="no AF_BLUETOOTH") as e:
        await _drain(HciSource(0, clock))
    assert e.value.reason is SourceReason.NO_BLUETOOTH
    assert dev_id_of("hci3") == 3 and dev_id_of(None) == 0
    with pytest.raises(ValueError, match="hci0"):
        dev_id_of("bt0")


def test_hci_filter_layout():
    """hci_ufilter: event packets; Command Complete, Command Status, LE Meta (docs/radio.md §6, kernel hci_sock.h)."""
    import struct

    from listenpost.agent.sources.hci import HCI_FILTER_EVENTS

    type_mask, ev0, ev1, opcode = struct.unpack("<IIIH", HCI_FILTER_EVENTS)
    assert (
        type_mask == 1 << 4 and ev0 == (1 << 0x0E) | (1 << 0x0F) and ev1 == 1 << (0x3E - 32) and opcode == 0
    )


async def test_hci_source_hands_over_queued_packets_as_one_batch(clock):
    """
    What the socket holds at a wake-up comes as one batch stamped with one clock reading, in order; a
    flood comes in batches of at most DRAIN_MAX packets; flattened, it is what the per-advert view yields.
    """
    import asyncio
    import socket

    from listenpost.agent.sources.hci import DRAIN_MAX, HciSource

    def legacy(rssi: int) -> bytes:
        return LEGACY[:-1] + (rssi & 0xFF).to_bytes(1, "big")

    ours, theirs = socket.socketpair(socket.AF_UNIX, socket.SOCK_SEQPACKET)
    src = HciSource(0, clock, sock=ours)
    it = src.batches()
    for rssi in (-50, -51, -52):
        theirs.send(legacy(rssi))
    first = await asyncio.wait_for(it.__anext__(), 5)
    assert [(a.rssi_dbm, a.t_mono_ns) for a in first] == [(r, 1000 * 10**9) for r in (-50, -51, -52)]
    await clock.advance(1.5)
    for pkt in (legacy(-60), b"\x04\x0e\x04\x01\x0c\x20\x00", legacy(-61)):  # a Command Complete between
        theirs.send(pkt)
    second = await asyncio.wait_for(it.__anext__(), 5)
    assert [(a.rssi_dbm, a.t_mono_ns) for a in second] == [(-60, 1001_500_000_000), (-61, 1001_500_000_000)]
    n = DRAIN_MAX + 6
    for i in range(n):
        theirs.send(legacy(-40 - i))
    theirs.close()
    rest = [b async for b in it]
    assert [len(b) for b in rest] == [DRAIN_MAX, 6]
    assert [a.rssi_dbm for b in rest for a in b] == [-40 - i for i in range(n)]
    assert src.stats()["packets"] == 6 + n and src.stats()["adverts"] == 5 + n

    # the per-advert view of the same packets
    ours, theirs = socket.socketpair(socket.AF_UNIX, socket.SOCK_SEQPACKET)
    for i in range(n):
        theirs.send(legacy(-40 - i))
    theirs.close()
    singles = await asyncio.wait_for(_drain(HciSource(0, clock, sock=ours)), 5)
    assert singles == [a for b in rest for a in b]
