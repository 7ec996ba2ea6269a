"""
Decode: beacon payloads → canonical identities, checked against published vectors and scapy.

Chain used for outside checks: scapy's contrib layers build the AD bytes (or a published vector gives
them), bluetooth-data-tools splits them into manufacturer/service data exactly as an `Advert` holds
them, our `Decoder` names the tag, and scapy's own dissection of the same bytes says what it should be.
"""

from __future__ import annotations

import uuid

import pytest
import scapy.contrib.altbeacon as s_alt
import scapy.contrib.eddystone as s_eddy
import scapy.contrib.ibeacon as s_ib
from bluetooth_data_tools import parse_advertisement_data_bytes
from hypothesis import given, settings
from hypothesis import strategies as st
from scapy.layers.bluetooth import EIR_Hdr, EIR_Manufacturer_Specific_Data

from listenpost.agent.pipeline.decode import EDDYSTONE_UUID, Decoder, parse_tlm
from listenpost.agent.pipeline.filter import TagFilter
from listenpost.core.records import Advert, Reading, Telemetry, uuid16_to_128
from listenpost.core.settings import DecodeRule

ADDR = "C4:7A:10:00:2B:91"


def advert_from_ad(ad: bytes, address: str = ADDR, rssi: int = -67, t_ns: int = 5_000_000_000) -> Advert:
    """An Advert whose fields come from bluetooth-data-tools' parse of raw AD bytes."""
    name, uuids, service_data, manufacturer_data, tx = parse_advertisement_data_bytes(ad)
    return Advert(t_ns, address, 1, rssi, tx, dict(manufacturer_data), dict(service_data), tuple(uuids), name)


def ad_of(frame) -> bytes:
    """AD bytes of a scapy beacon helper: each structure built on its own and joined (docs/references.md §1)."""
    return b"".join(bytes(x) for x in frame.build_eir())


def counters(d: Decoder) -> tuple[int, int, int, int, int]:
    return d.decoded, d.unregistered, d.decode_errors, d.no_identity, d.tlm_unmatched


# --------------------------------------------------------------- published vectors (docs/references.md §4)


class TestPublishedVectors:
    def test_ibeacon_vector(self):
        """docs/references.md §4 iBeacon vector (UUID e2c56db5-…, major 1, minor 258, power -59; [RUN] with scapy)."""
        ad = bytes.fromhex("0201061aff4c000215e2c56db5dffb48d2b060d0f5a71096e000010102c5")
        r = Decoder()(advert_from_ad(ad))
        assert r is not None
        assert "ibeacon:e2c56db5-dffb-48d2-b060-d0f5a71096e0:1:258" == r.tag
        # scapy.contrib.ibeacon dissects the same bytes to the same fields.
        d = EIR_Hdr(ad[3:])[s_ib.IBeacon_Data]
        assert f"ibeacon:{d.uuid}:{d.major}:{d.minor}" == r.tag

    def test_altbeacon_vector(self):
        """AltBeacon Protocol Specification v1.0 (github AltBeacon/spec) layout; docs/references.md §4 vector, ID 01..14."""
        ad = bytes.fromhex("1bff1801beac0102030405060708090a0b0c0d0e0f1011121314c200")
        r = Decoder()(advert_from_ad(ad))
        assert r is not None
        assert "altbeacon:0102030405060708090a0b0c0d0e0f1011121314" == r.tag
        a = EIR_Hdr(ad)[s_alt.AltBeacon]
        assert a.id1.bytes + a.id2.to_bytes(2, "big") + a.id3.to_bytes(2, "big") == bytes.fromhex(
            r.tag.split(":")[1]
        )

    def test_eddystone_uid_vector(self):
        """google/eddystone eddystone-uid/README.md layout; docs/references.md §4 vector (ranging -20)."""
        ad = bytes.fromhex("1716aafe00ec8b0ca750095477cb3e770000000000a10000")
        r = Decoder()(advert_from_ad(ad))
        assert r is not None
        assert "eddystone:8b0ca750095477cb3e77:0000000000a1" == r.tag
        u = EIR_Hdr(ad)[s_eddy.Eddystone_UID]
        assert f"eddystone:{u.namespace.hex()}:{u.instance.hex()}" == r.tag

    def test_eddystone_uid_without_rfu(self):
        """A UID frame may omit the two RFU bytes (length byte 0x15; google/eddystone eddystone-uid)."""
        ad = bytes.fromhex("1516aafe00ec8b0ca750095477cb3e770000000000a1")
        r = Decoder()(advert_from_ad(ad))
        assert r is not None and "eddystone:8b0ca750095477cb3e77:0000000000a1" == r.tag

    @pytest.mark.parametrize(
        ("hex_ad", "expected"),
        [
            # google/eddystone eddystone-tlm/tlm-plain.md field layout; docs/references.md §4 vectors [RUN].
            ("1116aafe20000bb817c0000004d200008ca0", Telemetry(3000, 23.75, 1234, 3600.0)),
            ("1116aafe20000bb8fa80000004d200008ca0", Telemetry(3000, -5.5, 1234, 3600.0)),
            # 0x8000 = temperature not supported, VBATT 0 = not supported (tlm-plain.md).
            ("1116aafe200000008000000004d200008ca0", Telemetry(None, None, 1234, 3600.0)),
        ],
    )
    def test_eddystone_tlm_vectors(self, hex_ad, expected):
        """TLM after a UID from the same address becomes a reading of that Eddystone tag with telemetry."""
        dec = Decoder()
        uid = dec(advert_from_ad(bytes.fromhex("1716aafe00ec8b0ca750095477cb3e770000000000a10000")))
        r = dec(advert_from_ad(bytes.fromhex(hex_ad), rssi=-71, t_ns=6_000_000_000))
        assert uid is not None and r is not None
        assert (uid.tag, 6_000_000_000, -71, expected) == (r.tag, r.t_mono_ns, r.rssi_dbm, r.telemetry)

    def test_scapy_tlm_temperature_is_unsigned(self):
        """scapy 2.8's Eddystone_TLM_Unencrypted reads TEMP as unsigned 8.8 (docs/references.md §4): -5.5 °C shows as 250.5.

        The spec says signed 8.8, so we must differ from scapy by exactly 256 here.
        """
        ad = bytes.fromhex("1116aafe20000bb8fa80000004d200008ca0")
        t = EIR_Hdr(ad)[s_eddy.Eddystone_TLM_Unencrypted]
        assert 250.5 == t.temperature
        ours = parse_tlm(advert_from_ad(ad).service_data[EDDYSTONE_UUID])
        assert t.temperature - 256 == ours.temperature_c
        assert (t.batt_mv, t.adv_cnt, t.sec_cnt / 10) == (ours.battery_mv, ours.adv_count, ours.uptime_s)


# --------------------------------------------------------------- scapy-built payloads, many of them

u16 = st.integers(0, 0xFFFF)
s8 = st.integers(-128, 127)
# Not st.uuids(): it draws through a shared true-random source, and Hypothesis then sometimes finds the
# generation inconsistent between runs of one example (FlakyStrategyDefinition) on a busy machine.
uuid_values = st.binary(min_size=16, max_size=16).map(lambda b: uuid.UUID(bytes=b))


class TestAgainstScapy:
    @settings(max_examples=150, deadline=None)
    @given(uuid_values, u16, u16, s8)
    def test_ibeacon(self, u, major, minor, power):
        """scapy.contrib.ibeacon builds the frame and dissects it; our identity uses the same uuid/major/minor."""
        frame = s_ib.Apple_BLE_Submessage(subtype=0x02) / s_ib.IBeacon_Data(
            uuid=str(u), major=major, minor=minor, tx_power=power
        )
        ad = ad_of(frame)
        d = EIR_Hdr(ad[3:])[s_ib.IBeacon_Data]
        r = Decoder()(advert_from_ad(ad))
        assert r is not None
        assert f"ibeacon:{d.uuid}:{d.major}:{d.minor}" == r.tag

    @settings(max_examples=150, deadline=None)
    @given(uuid_values, u16, u16, s8, u16)
    def test_altbeacon_any_company(self, u, id2, id3, power, company):
        """scapy.contrib.altbeacon under any company ID (the spec allows any manufacturer)."""
        if company == 0x004C:
            company = 0x0118
        pkt = (
            EIR_Hdr()
            / EIR_Manufacturer_Specific_Data(company_identifier=company)
            / s_alt.AltBeacon(id1=str(u), id2=id2, id3=id3, tx_power=power, mfg_reserved=0)
        )
        ad = bytes(pkt)
        a = EIR_Hdr(ad)[s_alt.AltBeacon]
        r = Decoder()(advert_from_ad(ad))
        assert r is not None
        assert (
            "altbeacon:" + (a.id1.bytes + a.id2.to_bytes(2, "big") + a.id3.to_bytes(2, "big")).hex() == r.tag
        )

    @settings(max_examples=150, deadline=None)
    @given(st.binary(min_size=10, max_size=10), st.binary(min_size=6, max_size=6), s8)
    def test_eddystone_uid(self, ns, inst, power):
        """scapy.contrib.eddystone UID frames."""
        frame = s_eddy.Eddystone_Frame() / s_eddy.Eddystone_UID(
            tx_power=power, namespace=ns, instance=inst, reserved=b"\0\0"
        )
        ad = ad_of(frame)
        r = Decoder()(advert_from_ad(ad))
        assert r is not None
        assert f"eddystone:{ns.hex()}:{inst.hex()}" == r.tag

    @settings(max_examples=150, deadline=None)
    @given(u16, st.integers(-128 * 256, 128 * 256 - 1), st.integers(0, 2**32 - 1), st.integers(0, 2**32 - 1))
    def test_eddystone_tlm(self, batt, temp_raw, adv, sec):
        """scapy builds TLM frames from raw 8.8 values; temperature compared with scapy's unsigned reading
        corrected by 256 (scapy bug, docs/references.md §4)."""
        temp_unsigned = (temp_raw & 0xFFFF) / 256
        frame = (
            s_eddy.Eddystone_Frame()
            / s_eddy.Eddystone_TLM(version=0)
            / s_eddy.Eddystone_TLM_Unencrypted(
                batt_mv=batt, temperature=temp_unsigned, adv_cnt=adv, sec_cnt=sec
            )
        )
        ad = ad_of(frame)
        t = EIR_Hdr(ad[-18:])[s_eddy.Eddystone_TLM_Unencrypted]
        dec = Decoder()
        dec(advert_from_ad(bytes.fromhex("1716aafe00ec8b0ca750095477cb3e770000000000a10000")))
        r = dec(advert_from_ad(ad))
        assert r is not None and r.telemetry is not None
        raw = t.getfieldval("temperature")  # scapy's unsigned 8.8 integer, before its Decimal rounding
        assert temp_raw & 0xFFFF == raw
        want_temp = None if raw == 0x8000 else (raw - 0x10000 if raw >= 0x8000 else raw) / 256
        assert Telemetry(t.batt_mv or None, want_temp, t.adv_cnt, t.sec_cnt / 10) == r.telemetry


# --------------------------------------------------------------- bytes off the air never raise

company_ids = st.one_of(st.sampled_from([0x004C, 0x0118, 0xFFFF, 0x0006]), u16)
service_keys = st.one_of(
    st.just(EDDYSTONE_UUID),
    st.sampled_from([uuid16_to_128(0x180F), uuid16_to_128(0xFD6F)]),
    uuid_values.map(str),
)
payload = st.one_of(
    st.binary(max_size=40),
    st.builds(lambda b: b"\x02\x15" + b, st.binary(max_size=30)),
    st.builds(lambda b: b"\xbe\xac" + b, st.binary(max_size=30)),
    st.builds(lambda f, b: bytes([f]) + b, st.sampled_from([0x00, 0x10, 0x20, 0x30]), st.binary(max_size=24)),
    st.builds(lambda b: b"\x20\x00" + b, st.binary(max_size=16)),
    st.builds(lambda b: b"\x4c\x50" + b, st.binary(max_size=8)),
)
RULES = (
    DecodeRule("lpx", company_id=0xFFFF, prefix=b"\x4c\x50", offset=2, length=4),
    DecodeRule("batt", service_uuid16=0x180F, offset=0, length=1),
)


class TestNeverRaises:
    @settings(max_examples=400, deadline=None)
    @given(
        st.dictionaries(company_ids, payload, max_size=3),
        st.dictionaries(service_keys, payload, max_size=3),
        st.booleans(),
    )
    def test_arbitrary_payloads(self, md, sd, with_registry):
        """Any manufacturer/service data: the decoder returns a reading or None, and counts exactly one outcome."""
        reg = TagFilter([f"mac:{ADDR}"]) if with_registry else None
        dec = Decoder(RULES, registry=reg)
        before = sum(counters(dec))
        dec(Advert(1, "D0:00:00:00:00:01", 1, -80, None, md, sd))
        assert before + 1 == sum(counters(dec))

    @pytest.mark.parametrize(
        ("md", "sd"),
        [
            ({0x004C: b"\x02\x15" + bytes(20)}, {}),  # iBeacon truncated by one byte
            ({0x004C: b"\x02\x15" + bytes(22)}, {}),  # iBeacon overlong
            ({0x004C: b"\x02\x15"}, {}),  # marker only
            ({0x0118: b"\xbe\xac" + bytes(21)}, {}),  # AltBeacon truncated
            ({0x0118: b"\xbe\xac" + bytes(23)}, {}),  # AltBeacon overlong
            ({}, {EDDYSTONE_UUID: b""}),  # zero-length Eddystone service data
            ({}, {EDDYSTONE_UUID: b"\x00\xec" + bytes(15)}),  # UID truncated
            ({}, {EDDYSTONE_UUID: b"\x00\xec" + bytes(19)}),  # UID overlong
            ({}, {EDDYSTONE_UUID: b"\x20"}),  # TLM without version
            ({}, {EDDYSTONE_UUID: b"\x20\x00" + bytes(11)}),  # TLM truncated
            ({0xFFFF: b"\x4c\x50\x00\x00\x07"}, {}),  # configured rule: id cut short
        ],
    )
    def test_malformed_frames_are_counted(self, md, sd):
        """A frame whose marker matches but whose length does not is a decode error, not an identity."""
        dec = Decoder(RULES)
        assert dec(Advert(1, ADDR, 0, -60, None, md, sd)) is None
        assert (0, 0, 1, 0, 0) == counters(dec)


# --------------------------------------------------------------- rules, precedence, registry, TLM memory


class TestBehaviour:
    def test_configured_company_rule(self):
        """docs/demo-venue.md custom firmware: company 0xFFFF, payload 4C 50 + 4-byte tag number → lpx:<8 hex>."""
        dec = Decoder(RULES)
        r = dec(Advert(1, ADDR, 1, -60, None, {0xFFFF: bytes.fromhex("4c5000000007ee")}))
        assert r is not None and "lpx:00000007" == r.tag

    def test_configured_service_rule_and_prefix_mismatch(self):
        """A service-UUID rule matches by UUID; a company rule whose prefix differs names nothing."""
        dec = Decoder(RULES, registry=TagFilter(["batt:64"]))
        r = dec(Advert(1, ADDR, 1, -60, None, {}, {uuid16_to_128(0x180F): b"\x64"}))
        assert r is not None and "batt:64" == r.tag
        assert dec(Advert(1, ADDR, 1, -60, None, {0xFFFF: bytes.fromhex("4d5000000007")})) is None
        assert 1 == dec.no_identity

    def test_ibeacon_before_eddystone(self):
        """An advert carrying both an iBeacon-format frame and an Eddystone UID is the iBeacon."""
        ib = bytes.fromhex("0201061aff4c000215e2c56db5dffb48d2b060d0f5a71096e000010102c5")
        ed = bytes.fromhex("1716aafe00ec8b0ca750095477cb3e770000000000a10000")
        r = Decoder()(advert_from_ad(ib + ed))
        assert r is not None and r.tag.startswith("ibeacon:")

    def test_other_apple_and_eddystone_frames_name_nothing(self):
        """Apple non-iBeacon messages, Eddystone-URL and encrypted TLM frames are not errors and not identities."""
        dec = Decoder(registry=TagFilter([]))
        assert dec(Advert(1, ADDR, 1, -60, None, {0x004C: b"\x10\x05\x01\x18\x00\x00\x00"})) is None
        url = ad_of(s_eddy.Eddystone_URL.from_url("https://example.org"))
        assert dec(advert_from_ad(url)) is None
        assert dec(Advert(1, ADDR, 1, -60, None, {}, {EDDYSTONE_UUID: b"\x20\x01" + bytes(16)})) is None
        assert (0, 0, 0, 3, 0) == counters(dec)

    def test_registered_address_wins_and_unregistered_address_names_nothing(self):
        """With a registry, a registered address is its mac: tag whatever the payload; others get no mac: identity."""
        ib = bytes.fromhex("0201061aff4c000215e2c56db5dffb48d2b060d0f5a71096e000010102c5")
        dec = Decoder(registry=TagFilter([f"mac:{ADDR}"]))
        r = dec(advert_from_ad(ib))
        assert r is not None and f"mac:{ADDR}" == r.tag
        assert dec(Advert(1, "D0:00:00:00:00:01", 1, -60)) is None
        assert (1, 0, 0, 1, 0) == counters(dec)

    def test_standalone_falls_back_to_address(self):
        """Without a registry, an advert with no payload identity is named by its address."""
        r = Decoder()(Advert(1, "d0:00:00:00:00:01", 1, -60))
        assert r is not None and "mac:D0:00:00:00:00:01" == r.tag

    def test_tlm_unmatched_and_lru(self):
        """TLM from an address never seen with a UID is counted and dropped; the address memory is bounded."""
        uid = bytes.fromhex("1716aafe00ec8b0ca750095477cb3e770000000000a10000")
        tlm = bytes.fromhex("1116aafe20000bb817c0000004d200008ca0")
        dec = Decoder(tlm_memory=2)
        assert dec(advert_from_ad(tlm, address="D0:00:00:00:00:09")) is None
        assert 1 == dec.tlm_unmatched
        for a in ("D0:00:00:00:00:01", "D0:00:00:00:00:02", "D0:00:00:00:00:03"):
            dec(advert_from_ad(uid, address=a))
        assert dec(advert_from_ad(tlm, address="D0:00:00:00:00:01")) is None  # forgotten (least recent)
        assert dec(advert_from_ad(tlm, address="D0:00:00:00:00:03")) is not None
        assert 2 == dec.tlm_unmatched

    def test_tlm_of_unregistered_eddystone_is_not_remembered(self):
        """With a registry, a UID that is not registered leaves no address in memory: its TLM is unmatched."""
        uid = bytes.fromhex("1716aafe00ec8b0ca750095477cb3e770000000000a10000")
        tlm = bytes.fromhex("1116aafe20000bb817c0000004d200008ca0")
        dec = Decoder(registry=TagFilter(["eddystone:00000000000000000000:000000000001"]))
        assert dec(advert_from_ad(uid)) is None  # recognised, not registered: dropped on its bytes
        assert dec(advert_from_ad(tlm)) is None
        assert (0, 1, 0, 0, 1) == counters(dec)
        assert 0 == len(dec._eddy_by_addr)

    def test_address_switching_to_unregistered_uid_loses_its_tlm(self):
        """A TLM is credited to the identity an address named last, never to an older registered one."""
        reg_uid = bytes.fromhex("1716aafe00ec8b0ca750095477cb3e770000000000a10000")
        other_uid = bytes.fromhex("1716aafe00ec000000000000000000000000000000a10000")
        tlm = bytes.fromhex("1116aafe20000bb817c0000004d200008ca0")
        dec = Decoder(registry=TagFilter(["eddystone:8b0ca750095477cb3e77:0000000000a1"]))
        assert dec(advert_from_ad(reg_uid)) is not None
        assert dec(advert_from_ad(tlm)) is not None
        assert dec(advert_from_ad(other_uid)) is None
        assert dec(advert_from_ad(tlm)) is None
        assert 1 == dec.tlm_unmatched
        assert 0 == len(dec._eddy_by_addr)

    def test_uuid_text_matches_stdlib(self):
        """The iBeacon UUID text equals Python's uuid.UUID text of the same 16 bytes (RFC 4122 form)."""
        raw = uuid.uuid4().bytes
        r = Decoder()(Advert(1, ADDR, 1, -60, None, {0x004C: b"\x02\x15" + raw + b"\x00\x07\x00\x2a\xc5"}))
        assert r is not None and f"ibeacon:{uuid.UUID(bytes=raw)}:7:42" == r.tag


# --------------------------------------------------------------- the attached decoder agrees with decode-then-filter

REG_UUID = bytes.fromhex("4d2a0c1e7f3b4c559e612b8f0a7d3c10")
REG_NS = bytes.fromhex("8b0ca750e7a74e14bd99")
REGISTERED = (
    [f"ibeacon:{uuid.UUID(bytes=REG_UUID)}:7:{m}" for m in range(1, 4)]
    + [f"eddystone:{REG_NS.hex()}:{i:012x}" for i in range(1, 4)]
    + ["altbeacon:" + bytes(range(20)).hex(), "lpx:00000002", "batt:05", "mac:D0:00:00:00:00:02"]
)
small = st.integers(0, 4)
tagged_advert = st.one_of(
    st.builds(
        lambda u, m: {0x004C: b"\x02\x15" + u + b"\x00\x07" + m.to_bytes(2, "big") + b"\xc5"},
        st.sampled_from([REG_UUID, bytes(16)]),
        small,
    ),
    st.builds(lambda i: {0x0118: b"\xbe\xac" + bytes(range(i, i + 20)) + b"\xc5\x00"}, st.integers(0, 1)),
    st.builds(lambda n: {0xFFFF: b"\x4c\x50" + n.to_bytes(4, "big")}, small),
    st.builds(
        lambda ns, i: {"eddy": b"\x00\xec" + ns + i.to_bytes(6, "big") + b"\0\0"},
        st.sampled_from([REG_NS, bytes(10)]),
        small,
    ),
    st.just({"eddy": bytes.fromhex("20000bb817c0000004d200008ca0")}),
    st.builds(lambda b: {"batt": bytes([b])}, st.integers(4, 6)),
    st.dictionaries(company_ids, payload, max_size=2),
)


def _advert(i: int, addr_n: int, spec: dict) -> Advert:
    md = {k: v for k, v in spec.items() if isinstance(k, int)}
    sd = {EDDYSTONE_UUID: spec["eddy"]} if "eddy" in spec else {}
    if "batt" in spec:
        sd[uuid16_to_128(0x180F)] = spec["batt"]
    return Advert(i, f"D0:00:00:00:00:{addr_n:02X}", 1, -60 - i % 30, None, md, sd)


@settings(max_examples=150, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 3), tagged_advert), max_size=40))
def test_attached_decoder_equals_standalone_then_filter(items):
    """Matching registered tags on raw bytes gives exactly the readings of formatting every identity and filtering."""
    adverts = [_advert(i, a, spec) for i, (a, spec) in enumerate(items)]
    f_attached, f_after = TagFilter(REGISTERED), TagFilter(REGISTERED)
    attached, standalone = Decoder(RULES, registry=f_attached), Decoder(RULES)
    got = [r for a in adverts if (r := attached(a)) is not None and f_attached(r) is not None]
    want = []
    for a in adverts:
        mac_first = f"mac:{a.address}" in f_after  # the attached decoder checks a registered address first
        r = Reading(f"mac:{a.address}", a.t_mono_ns, a.rssi_dbm) if mac_first else standalone(a)
        if r is not None and f_after(r) is not None:
            want.append(r)
    assert want == got


def test_make_reading_builds_the_same_frozen_reading():
    """The fast constructor gives an object equal to, hashing like and as immutable as Reading(...)."""
    import dataclasses

    from listenpost.agent.pipeline.decode import make_reading

    tel = Telemetry(3000, -5.5, 1, 0.1)
    fast, slow = make_reading("lpx:00000007", 5, -61.5, tel), Reading("lpx:00000007", 5, -61.5, tel)
    assert (slow, hash(slow), repr(slow)) == (fast, hash(fast), repr(fast))
    assert Reading("lpx:00000007", 5, -61.5) == make_reading("lpx:00000007", 5, -61.5)
    with pytest.raises(dataclasses.FrozenInstanceError):
        fast.rssi_dbm = 0  # type: ignore[misc]
