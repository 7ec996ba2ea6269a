"""Wire protocol v1 batch content: columnar round trip, digest stability, field-named errors."""

from __future__ import annotations

import copy
import gzip
import json

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from listenpost.core import jsonload
from listenpost.core.jsonload import JsonError
from listenpost.core.records import Reading, Telemetry
from listenpost.core.wire import (
    WireError,
    canonical_json,
    decode_content,
    digest,
    encode_batch,
    encode_content,
    parse_batch,
    parse_batch_body,
    parse_clock,
)

readings_st = st.lists(
    st.builds(
        Reading,
        tag=st.sampled_from(
            ["mac:C4:7A:10:00:2B:91", "lpx:00000007", "ibeacon:4d2a0c1e-7f3b-4c55-9e61-2b8f0a7d3c10:7:42"]
        ),
        t_mono_ns=st.integers(0, 10**10).map(lambda v: v * 1_000_000),
        rssi_dbm=st.integers(-1200, 200).map(lambda v: v / 10),
    ),
    max_size=200,
)


@given(readings_st)
@settings(max_examples=60, deadline=None)
def test_round_trip_keeps_every_reading(readings: list[Reading]) -> None:
    """Encoding then decoding gives the same multiset of (tag, time, rssi), sorted by time."""
    content = encode_content(readings, boot="b1", offset_db=2.5)
    back = list(decode_content(json.loads(canonical_json(content))).readings())
    assert sorted((r.t_mono_ns, r.tag, r.rssi_dbm) for r in readings) == sorted(
        (r.t_mono_ns, r.tag, r.rssi_dbm) for r in back
    )
    assert [r.t_mono_ns for r in back] == sorted(r.t_mono_ns for r in back)


def test_digest_is_order_independent_of_input_and_changes_with_content() -> None:
    """Sealing sorts readings, so the digest depends on content only; any change in a value changes it."""
    a = [
        Reading("mac:AA:AA:AA:AA:AA:AA", 2_000_000, -60.5),
        Reading("mac:BB:BB:BB:BB:BB:BB", 1_000_000, -70.0),
    ]
    d1 = digest(encode_content(a, boot="b", offset_db=0))
    assert d1 == digest(encode_content(list(reversed(a)), boot="b", offset_db=0))
    assert d1 != digest(
        encode_content([a[0], Reading(a[1].tag, a[1].t_mono_ns, -70.1)], boot="b", offset_db=0)
    )
    assert len(d1) == 64


def test_telemetry_travels_with_its_reading() -> None:
    """Eddystone-TLM telemetry is attached to the reading it came with."""
    tel = Telemetry(battery_mv=2980, temperature_c=-5.5, adv_count=1234, uptime_s=3600.0)
    content = encode_content(
        [Reading("eddystone:8b0ca750e7a74e14bd99:00000000001e", 5_000_000, -80, tel)], boot="b", offset_db=0
    )
    (r,) = decode_content(content).readings()
    assert r.telemetry == tel


def _content() -> dict:
    return encode_content(
        [Reading("mac:AA:AA:AA:AA:AA:AA", 1_000_000, -60), Reading("lpx:00000007", 3_000_000, -61)],
        boot="b",
        offset_db=1.0,
    )


@pytest.mark.parametrize(
    ("mutate", "field"),
    [
        (lambda c: c["readings"].__setitem__("dt_ms", [0, -1]), "content.readings.dt_ms[1]"),
        (lambda c: c["readings"].__setitem__("tag", [0, 7]), "content.readings.tag[1]"),
        (lambda c: c["readings"].__setitem__("rssi_dd", [-600]), "content.readings"),
        (lambda c: c.__setitem__("offset_db", "x"), "content.offset_db"),
        (lambda c: c.__setitem__("offset_db", float("nan")), "content.offset_db"),
        (lambda c: c.__setitem__("boot", ""), "content.boot"),
        (lambda c: c["readings"].__setitem__("t0_ms", True), "content.readings.t0_ms"),
        (
            lambda c: c.__setitem__(
                "gap", {"first_seq": 3, "last_seq": 1, "readings": 0, "reason": "spool_full"}
            ),
            "content.gap.last_seq",
        ),
        (
            lambda c: c.__setitem__("gap", {"first_seq": 1, "last_seq": 1, "readings": 0, "reason": "lost"}),
            "content.gap.reason",
        ),
        (
            lambda c: c.__setitem__("telemetry", [{"tag": "lpx:00000007", "t_ms": 1, "battery_mv": "low"}]),
            "content.telemetry[0].battery_mv",
        ),
        # Identities must be canonical (listenpost.core.identity), the only form an agent produces.
        (lambda c: c["readings"]["tags"].__setitem__(1, "phone-of-visitor-42"), "content.readings.tags[1]"),
        (lambda c: c["readings"]["tags"].__setitem__(1, "lpx:00000007\x00"), "content.readings.tags[1]"),
        (lambda c: c["readings"]["tags"].__setitem__(1, "lpx:\ud800"), "content.readings.tags[1]"),
        (lambda c: c["readings"]["tags"].__setitem__(0, "mac:aa:aa:aa:aa:aa:aa"), "content.readings.tags[0]"),
        (
            lambda c: c["readings"]["tags"].__setitem__(0, " mac:AA:AA:AA:AA:AA:AA"),
            "content.readings.tags[0]",
        ),
        (lambda c: c["readings"]["tags"].__setitem__(1, ["lpx:00000007"]), "content.readings.tags[1]"),
        (lambda c: c.__setitem__("boot", "boot\x00"), "content.boot"),
        (lambda c: c.__setitem__("boot", "b" * 65), "content.boot"),
        (
            lambda c: c.__setitem__("telemetry", [{"tag": "mac:BB:BB:BB:BB:BB:BB", "t_ms": 1}]),
            "content.telemetry[0].tag",
        ),
        (
            lambda c: c.__setitem__("telemetry", [{"tag": "lpx:00000007", "t_ms": 2**70}]),
            "content.telemetry[0].t_ms",
        ),
        (
            lambda c: c.__setitem__("telemetry", [{"tag": "lpx:00000007", "t_ms": 3, "uptime_s": 10**30}]),
            "content.telemetry[0].uptime_s",
        ),
        (
            lambda c: c.__setitem__(
                "gap", {"first_seq": 1, "last_seq": 2**80, "readings": 0, "reason": "spool_full"}
            ),
            "content.gap.last_seq",
        ),
    ],
)
def test_bad_content_names_the_field(mutate, field: str) -> None:
    """Every malformed field is rejected with its path, so the collector's 400 can say which."""
    c = copy.deepcopy(_content())
    mutate(c)
    with pytest.raises(WireError) as e:
        decode_content(c)
    assert e.value.field == field


def test_gzip_body_is_small_per_reading() -> None:
    """Columnar + gzip: a realistic 5 s batch (40 tags heard at ~2 Hz) costs a few bytes per reading."""
    import random

    rnd = random.Random(7)
    tags = [f"ibeacon:4d2a0c1e-7f3b-4c55-9e61-2b8f0a7d3c10:7:{i}" for i in range(40)]
    rs = [
        Reading(rnd.choice(tags), rnd.randrange(0, 5_000) * 1_000_000, rnd.randrange(-95, -50))
        for _ in range(400)
    ]
    body = gzip.compress(canonical_json(encode_content(rs, boot="b", offset_db=0)))
    assert len(body) / len(rs) < 8


def _envelope(**changes) -> dict:
    c = _content()
    body = {
        "v": 1,
        "board": "g0-a",
        "boot": "b",
        "epoch": "00112233aabbccdd",
        "seq": 0,
        "digest": digest(c),
        "clock": None,
        "t1": 10.0,
        "content": c,
    }
    body.update(changes)
    return body


@pytest.mark.parametrize(
    ("changes", "field"),
    [
        ({"t1": -1e15}, "t1"),
        ({"t1": 1e300}, "t1"),
        ({"boot": "two words"}, "boot"),
        ({"clock": {"t1": -5.0, "t2": 1.8e9, "t3": 1.8e9, "t4": 1.0}}, "clock.t1"),
        ({"clock": {"t1": 1.0, "t2": 1.8e9, "t3": 1.8e9, "t4": 1e300}}, "clock.t4"),
        ({"epoch": "00112233aabbccdd\n"}, "epoch"),  # a trailing newline is not a whole-string match
        ({"boot": "b\n"}, "boot"),
    ],
)
def test_bad_envelope_names_the_field(changes: dict, field: str) -> None:
    """Board times are never negative nor beyond 2^53 ms; boot ids are printable ASCII."""
    with pytest.raises(WireError) as e:
        parse_batch(_envelope(**changes), max_readings=10)
    assert e.value.field == field


def _sent(content: dict, *, dig: str | None = None, clock: dict | None = None) -> bytes:
    """A body as the agent's uplink sends it: the envelope, then the content's canonical bytes."""
    raw = canonical_json(content)
    return encode_batch(
        board="g0-a",
        boot="b",
        epoch="00112233aabbccdd",
        seq=3,
        digest=dig or digest(raw),
        t1=10.0,
        clock=clock,
        content=raw,
    )


def test_body_as_the_agent_sends_it_is_checked_without_encoding_the_content_again(monkeypatch) -> None:
    """The content's bytes as sent are the canonical ones: their hash is the digest, no re-encoding of the
    readings' columns (the rest is encoded again to see that the bytes are canonical)."""
    body = _sent(_content(), clock={"t1": 1.0, "t2": 1.8e9, "t3": 1.8e9, "t4": 1.1})
    whole = parse_batch(jsonload.loads(body), max_readings=10)
    encode = canonical_json

    def refuse(obj):
        if isinstance(obj.get("readings", {}).get("dt_ms"), list):
            raise AssertionError("readings encoded again")
        return encode(obj)

    monkeypatch.setattr("listenpost.core.wire.canonical_json", refuse)
    assert parse_batch_body(body, max_readings=10) == whole


@pytest.mark.parametrize(
    "layout",
    [
        pytest.param(
            lambda c, d: json.dumps({"digest": d, "content": c, **_envelope(digest=d, content=c)}, indent=1),
            id="pretty-printed",
        ),
        pytest.param(
            lambda c, d: json.dumps(
                {"content": c, **{k: v for k, v in _envelope(digest=d).items() if k != "content"}}
            ),
            id="content first",
        ),
        pytest.param(
            lambda c, d: _sent(c, dig=d).decode()[:-1] + ',"extra":{"content":1}}',
            id="a member after the content",
        ),
        pytest.param(
            lambda c, d: json.dumps({**_envelope(digest=d, content=c), "clock": None}).replace(
                '"clock": null', '"clock": null, "x": {"y": 1, "content": {}}'
            ),
            id="a nested content key first",
        ),
    ],
)
def test_any_other_layout_of_a_valid_body_is_parsed_whole(layout) -> None:
    """Key order and white space are the sender's choice: the digest is checked over the canonical content."""
    c = _content()
    body = layout(c, digest(c))
    text = body if isinstance(body, str) else body.decode()
    assert parse_batch_body(text.encode(), max_readings=10).content == decode_content(c)


def test_content_bytes_that_do_not_hash_to_the_digest_are_refused() -> None:
    c = _content()
    with pytest.raises(WireError) as e:
        parse_batch_body(_sent(c, dig="0" * 64), max_readings=10)
    assert e.value.field == "digest"
    # The digest of the content with one value changed is not this content's digest either.
    other = copy.deepcopy(c)
    other["readings"]["rssi_dd"][0] += 1
    with pytest.raises(WireError) as e:
        parse_batch_body(_sent(c, dig=digest(other)), max_readings=10)
    assert e.value.field == "digest"


def _relaid(c: dict) -> dict[str, bytes]:
    """The content's text laid out otherwise than canonically, each parsing to the same content."""
    canon = canonical_json(c)
    return {
        "spaces": json.dumps(c, sort_keys=True).encode(),
        "keys unsorted": json.dumps(c, separators=(",", ":")).encode(),
        "a key twice": b'{"boot":"other",' + canon[1:],
        "a float spelt longer": canon.replace(b'"offset_db":1.0', b'"offset_db":1.00'),
        "negative zero": canon.replace(b'"dt_ms":[0,', b'"dt_ms":[-0,'),
        "an escaped letter": canon.replace(b'"boot":"b"', b'"boot":"\\u0062"'),
    }


@pytest.mark.parametrize(
    "layout",
    ["spaces", "keys unsorted", "a key twice", "a float spelt longer", "negative zero", "an escaped letter"],
)
def test_content_bytes_not_canonical_are_not_their_own_digest(layout: str) -> None:
    """
    A content laid out otherwise than canonically, with the hash of those bytes as its digest, is refused
    as the whole-body parse refuses it: else one content could be stored under several digests (a resend
    re-encoded would be a conflict, not a duplicate), and bytes where a key stands twice be digested as
    something other than what is stored.
    """
    c = _content()
    raw = _relaid(c)[layout]
    assert jsonload.loads(raw) == c
    body = _sent(c, dig=digest(raw))[: -len(canonical_json(c)) - 1] + raw + b"}"
    for parse in (
        lambda: parse_batch(jsonload.loads(body), max_readings=10),
        lambda: parse_batch_body(body, max_readings=10),
    ):
        with pytest.raises(WireError) as e:
            parse()
        assert e.value.field == "digest"


@pytest.mark.parametrize(
    ("body", "problem"),
    [
        (b'{"v":1,"content":{"a":NaN}}', "NaN is not allowed"),
        (b'{"v":1,"content":{"a":1}', "not valid JSON"),
        (b'{"v":1,"content":{"a":1}}}', "not valid JSON"),
        (b'{"v":1,"clock":{"content":{"a":1}}', "not valid JSON"),
    ],
)
def test_a_body_that_is_not_strict_json_is_named_as_a_whole(body: bytes, problem: str) -> None:
    with pytest.raises(JsonError, match=problem):
        parse_batch_body(body, max_readings=10)


def test_board_and_collector_times_of_an_exchange() -> None:
    assert parse_clock({"t1": 1.0, "t2": 1.8e9, "t3": 1.8e9 + 0.001, "t4": 1.01}) == (
        1.0,
        1.8e9,
        1.8e9 + 0.001,
        1.01,
    )


@pytest.mark.parametrize(
    ("text", "problem"),
    [
        ('{"a": NaN}', "NaN is not allowed"),
        ('{"a": [Infinity]}', "Infinity is not allowed"),
        ('{"a": -Infinity}', "-Infinity is not allowed"),
        ("[1e999]", "not finite"),
        ('{"a": {"b": "x\\u0000y"}}', "a.b: a string holds a NUL"),
        ('{"a": ["ok", "\\ud800"]}', "a[1]: a string holds a lone surrogate"),
        ('{"\\udfff": 1}', "a key in the top: a string holds a lone surrogate"),
        ("[" * 17 + "]" * 17, "nested more than 16 levels deep"),
        ("[" * 100_000 + "]" * 100_000, "nested more than 16 levels deep"),
        ('{"a": 1', "not valid JSON"),
    ],
)
def test_strict_json_refuses_what_json_loads_lets_through(text: str, problem: str) -> None:
    with pytest.raises(JsonError) as e:
        jsonload.loads(text.encode())
    assert problem in str(e.value)


def test_strict_json_keeps_what_is_fine() -> None:
    """A surrogate pair is a real character; 16 levels are allowed; raw surrogates are not UTF-8."""
    assert jsonload.loads(b'{"a": "\\ud83d\\ude00", "b": 1.5}') == {"a": "\U0001f600", "b": 1.5}
    assert jsonload.loads("[" * 16 + "]" * 16) == [[[[[[[[[[[[[[[[]]]]]]]]]]]]]]]]
    with pytest.raises(JsonError, match="not UTF-8"):
        jsonload.loads(b'"\xed\xa0\x80"')


def _outcome(parse):
    try:
        return parse()
    except WireError as e:
        return ("WireError", e.field)
    except JsonError:
        return ("JsonError",)


_BYTES = [
    b" ",
    b"\n",
    b",",
    b"}",
    b"]",
    b"{",
    b"[",
    b'"',
    b"\\",
    b"0",
    b"-",
    b":",
    b"\xef\xbb\xbf",
    b'"content":',
]


@given(
    readings_st,
    st.sampled_from(["canonical", "spaces", "keys unsorted", "a key twice", "negative zero"]),
    st.booleans(),
    st.lists(st.tuples(st.integers(0, 10**6), st.integers(0, 2), st.sampled_from(_BYTES)), max_size=3),
)
@settings(max_examples=300, deadline=None)
def test_a_body_split_at_its_content_says_what_the_whole_body_says(
    readings, layout, dig_of_bytes, edits
) -> None:
    """
    For any body, laid out as sent or mutated anywhere (white space, brackets, quotes, escapes, a BOM, a
    second content member), the split parse accepts exactly what the whole-body parse accepts, and the
    same envelope; it refuses what that refuses, naming the same field.
    """
    c = encode_content(readings, boot="b", offset_db=1.0)
    raw = canonical_json(c) if layout == "canonical" else {**_relaid(c), "negative zero": None}[layout]
    if raw is None:
        raw = canonical_json(c).replace(b'"dt_ms":[0', b'"dt_ms":[-0', 1)
    dig = digest(raw) if dig_of_bytes else digest(c)
    body = _sent(c, dig=dig)[: -len(canonical_json(c)) - 1] + raw + b"}"
    for at, kind, b in edits:
        at %= len(body) + 1
        body = body[:at] + b + body[at + (kind == 1) * len(b) :] if kind < 2 else body[:at] + body[at + 1 :]
    whole = _outcome(lambda: parse_batch(jsonload.loads(body), max_readings=1000))
    assert _outcome(lambda: parse_batch_body(body, max_readings=1000)) == whole
