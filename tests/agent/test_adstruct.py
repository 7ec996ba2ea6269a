"""AD structure parsing, checked against scapy (builder) and bluetooth-data-tools (reference parser)."""

from __future__ import annotations

import pytest
from bluetooth_data_tools import parse_advertisement_data_bytes
from hypothesis import given, settings
from hypothesis import strategies as st

from listenpost.agent.sources.adstruct import AdFields, ad_structure, build_ad, parse_ad, uuid_to_le
from listenpost.core.records import uuid16_to_128

U180F = uuid16_to_128(0x180F)
UFEAA = uuid16_to_128(0xFEAA)


def _bdt(data: bytes) -> tuple:
    """bluetooth-data-tools 1.29 result as plain values (its containers are shared: copy)."""
    name, uuids, svc, mfg, tx = parse_advertisement_data_bytes(data)
    return name, list(uuids), dict(svc), dict(mfg), tx


def _ours(data: bytes) -> tuple:
    f = parse_ad(data)
    return f.local_name, list(f.service_uuids), f.service_data, f.manufacturer_data, f.tx_power_dbm


def test_scapy_vector_from_references():
    """The docs/references.md §1 vector built with scapy 2.8 parses to the fields scapy put in."""
    from scapy.layers.bluetooth import (
        EIR_CompleteList16BitServiceUUIDs,
        EIR_CompleteLocalName,
        EIR_Flags,
        EIR_Hdr,
        EIR_Manufacturer_Specific_Data,
        EIR_ServiceData16BitUUID,
        EIR_TX_Power_Level,
    )
    from scapy.packet import Raw

    elems = [
        EIR_Hdr() / EIR_Flags(flags=0x06),
        EIR_Hdr() / EIR_CompleteList16BitServiceUUIDs(svc_uuids=[0x180F, 0xFEAA]),
        EIR_Hdr() / EIR_TX_Power_Level(level=-4),
        EIR_Hdr() / EIR_ServiceData16BitUUID(svc_uuid=0x180F) / Raw(b"\x64"),
        EIR_Hdr() / EIR_Manufacturer_Specific_Data(company_identifier=0xFFFF) / Raw(b"\x01\x02\x03"),
        EIR_Hdr() / EIR_CompleteLocalName(local_name=b"tag-01"),
    ]
    ad = b"".join(bytes(e) for e in elems)
    # hex from docs/references.md §1 [RUN with scapy 2.8.0]
    assert ad.hex() == "02010605030f18aafe020afc04160f186406ffffff01020307097461672d3031"
    assert parse_ad(ad) == AdFields(
        {0xFFFF: b"\x01\x02\x03"}, {U180F: b"d"}, (U180F, UFEAA), -4, "tag-01", 0x06, 0
    )
    # our writer produces the same bytes as scapy's builder
    assert (
        build_ad(
            flags=6,
            service_uuids=[U180F, UFEAA],
            tx_power_dbm=-4,
            service_data={U180F: b"d"},
            manufacturer_data={0xFFFF: b"\x01\x02\x03"},
            local_name="tag-01",
        )
        == ad
    )
    # and bluetooth-data-tools 1.29 agrees on its five fields (docs/references.md §1)
    assert _ours(ad) == _bdt(ad)


def test_uuid32_and_uuid128_expansion_matches_scapy_bytes():
    """32-bit and 128-bit UUIDs: little-endian on air, expanded on the Bluetooth Base UUID (common practice)."""
    from scapy.layers.bluetooth import EIR_CompleteList128BitServiceUUIDs, EIR_Hdr

    u128 = "4d2a0c1e-7f3b-4c55-9e61-2b8f0a7d3c10"
    raw = bytes(EIR_Hdr() / EIR_CompleteList128BitServiceUUIDs(svc_uuids=[u128]))
    assert parse_ad(raw).service_uuids == (u128,)
    ad = ad_structure(0x05, bytes.fromhex("78563412")) + ad_structure(
        0x20, bytes.fromhex("78563412") + b"\x01"
    )
    f = parse_ad(ad)
    assert f.service_uuids == ("12345678-0000-1000-8000-00805f9b34fb",)
    assert f.service_data == {"12345678-0000-1000-8000-00805f9b34fb": b"\x01"}
    assert _ours(ad) == _bdt(ad)
    assert uuid_to_le(u128) == raw[2:]


# Each edge case: input, our fields (subset), errors, and whether bluetooth-data-tools agrees on its five fields.
EDGE_CASES = [
    pytest.param(b"", {}, 0, True, id="empty"),
    pytest.param(b"\x00" * 31, {}, 0, True, id="all-padding"),
    pytest.param(
        b"\x02\x01\x06\x00\x00\x03\x09ab", {"flags": 6, "local_name": "ab"}, 0, True, id="padding-then-more"
    ),
    pytest.param(b"\x05\x09ab", {}, 1, True, id="overlong"),
    pytest.param(b"\x02\x01\x06\x05\xff\x4c", {"flags": 6}, 1, True, id="overlong-after-good"),
    pytest.param(b"\x01\xff\x03\x09ab", {"local_name": "ab"}, 1, True, id="type-only-mfg"),
    pytest.param(b"\x01\x09\x03\x09ab", {"local_name": "ab"}, 0, True, id="type-only-name"),
    pytest.param(b"\x03\x09ab\x05", {"local_name": "ab"}, 1, True, id="lone-length-byte"),
    pytest.param(b"\x03\x0a\x01\x02", {}, 1, True, id="tx-power-two-bytes"),
    pytest.param(b"\x02\x0a\x80", {"tx_power_dbm": -128}, 0, True, id="tx-power-int8-min"),
    pytest.param(b"\x02\x0a\x7f", {"tx_power_dbm": 127}, 0, True, id="tx-power-int8-max"),
    pytest.param(b"\x02\xff\x4c", {}, 1, True, id="mfg-one-byte"),
    pytest.param(b"\x03\xff\x4c\x00", {"manufacturer_data": {0x004C: b""}}, 0, True, id="mfg-id-only"),
    pytest.param(
        b"\x04\xff\x4c\x00\x01\x04\xff\x4c\x00\x02",
        {"manufacturer_data": {0x004C: b"\x02"}},
        0,
        True,
        id="same-company-last-wins",
    ),
    pytest.param(b"\x02\x16\x0f", {}, 1, True, id="svc-data-short"),
    pytest.param(b"\x04\x03\x0f\x18\xaa", {"service_uuids": (U180F,)}, 1, True, id="uuid-list-partial"),
    pytest.param(b"\x03\x08ab\x03\x09cd", {"local_name": "cd"}, 0, True, id="short-then-complete"),
    pytest.param(b"\x03\x09cd\x03\x08ab", {"local_name": "cd"}, 0, True, id="complete-then-short"),
    pytest.param(b"\x03\x08ab\x03\x08cd", {"local_name": "ab"}, 0, True, id="two-short-first-wins"),
    pytest.param(b"\x03\x09\xff\xfe", {"local_name": "\ufffd\ufffd"}, 0, True, id="name-not-utf8"),
    pytest.param(b"\x03\x00ab\x03\x09cd", {"local_name": "cd"}, 0, True, id="type-zero-ignored"),
    pytest.param(b"\x01\x01", {}, 1, True, id="flags-empty"),
]


@pytest.mark.parametrize(("data", "expected", "errors", "bdt_agrees"), EDGE_CASES)
def test_edge_cases_are_deliberate(data, expected, errors, bdt_agrees):
    """Each documented edge case gives the documented fields and error count; bdt agreement as stated."""
    f = parse_ad(data)
    for key, value in expected.items():
        assert getattr(f, key) == value, key
    for key in {
        "manufacturer_data",
        "service_data",
        "service_uuids",
        "tx_power_dbm",
        "local_name",
        "flags",
    } - set(expected):
        assert getattr(f, key) in (None, {}, ()), key
    assert f.errors == errors
    assert (_ours(data) == _bdt(data)) is bdt_agrees


AD_TYPES = st.sampled_from(
    [0x00, 0x01, 0x02, 0x03, 0x04, 0x05, 0x06, 0x07, 0x08, 0x09, 0x0A, 0x16, 0x20, 0x21, 0xFF, 0x19]
)


@st.composite
def ad_bytes(draw) -> bytes:
    """Runs of AD structures with occasional padding, wrong lengths and truncation."""
    out = bytearray()
    for _ in range(draw(st.integers(0, 6))):
        kind = draw(st.integers(0, 9))
        if kind == 0:
            out += b"\x00" * draw(st.integers(1, 3))
            continue
        typ = draw(AD_TYPES)
        data = draw(st.binary(max_size=20))
        length = len(data) + 1
        if kind == 1:
            length = draw(st.integers(1, 255))  # any length, possibly lying
        out += bytes((length, typ)) + data
    if draw(st.booleans()):
        out = out[: draw(st.integers(0, len(out)))]
    return bytes(out)


@settings(max_examples=400, deadline=None)
@given(ad_bytes())
def test_agrees_with_bluetooth_data_tools_on_structured_input(data):
    """On generated AD runs, our five common fields equal bluetooth-data-tools 1.29's (docs/references.md §1)."""
    assert _ours(data) == _bdt(data)


@settings(max_examples=400, deadline=None)
@given(st.binary(max_size=64))
def test_random_bytes_never_raise_and_agree(data):
    """Any bytes parse without an exception, and still agree with bluetooth-data-tools."""
    f = parse_ad(data)
    assert f.errors >= 0
    assert _ours(data) == _bdt(data)


names = st.text(st.characters(codec="utf-8", exclude_categories=("Cs",)), min_size=1, max_size=8)
uuid16s = st.integers(0, 0xFFFF).map(uuid16_to_128)


@settings(max_examples=200, deadline=None)
@given(
    flags=st.none() | st.integers(0, 255),
    mfg=st.dictionaries(st.integers(0, 0xFFFF), st.binary(max_size=8), max_size=2),
    svc=st.dictionaries(uuid16s, st.binary(max_size=8), max_size=2),
    uuids=st.lists(uuid16s, max_size=3),
    tx=st.none() | st.integers(-128, 127),
    name=st.none() | names,
)
def test_build_then_parse_round_trips(flags, mfg, svc, uuids, tx, name):
    """`build_ad` output parses back to the same fields with no errors."""
    ad = build_ad(
        flags=flags,
        manufacturer_data=mfg,
        service_data=svc,
        service_uuids=uuids,
        tx_power_dbm=tx,
        local_name=name,
    )
    assert parse_ad(ad) == AdFields(mfg, svc, tuple(uuids), tx, name, flags, 0)


def test_writer_rejects_what_cannot_be_framed():
    """Helpers refuse data that does not fit an AD structure, naming the problem."""
    with pytest.raises(ValueError, match="at most 254"):
        ad_structure(0xFF, b"x" * 255)
    with pytest.raises(ValueError, match="not a UUID"):
        uuid_to_le("nope")
