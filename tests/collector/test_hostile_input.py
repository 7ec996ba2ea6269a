"""
A board or a stranger sending hostile bodies to a real collector on loopback (SQLite and PostgreSQL).

Every refusal is a 4xx naming the problem; nothing a request sends can make another board's batch
fail, put readings outside the collector's time window, or store an identity nobody registered.
"""

from __future__ import annotations

import asyncio
import json
from typing import Any

import pytest

from listenpost.collector.state import STORE
from listenpost.core import wire
from listenpost.core.records import Reading
from tests.collector.test_api import (
    TAGS,
    add_board,
    batch_body,
    enrolled,
    import_tags,
    make_client,
    readings,
)

DEEP = 100_000


@pytest.fixture
async def api(aiohttp_client, tmp_path, clock, store_factory):
    """A collector app on loopback over a real store of each backend (room for 200 batches at once)."""
    store = await store_factory.open()
    return await make_client(
        aiohttp_client, tmp_path, clock, store=store, limits={"max_inflight_batches": 512}
    )


def raw_batch(board: str, seq: int, content: dict[str, Any], **envelope: Any) -> bytes:
    """A batch body whose content is sent as given (the digest computed the way a sender would)."""
    head = {
        "v": 1,
        "board": board,
        "boot": "boot-1",
        "epoch": "00112233aabbccdd",
        "seq": seq,
        "digest": "0" * 64,
        "clock": None,
        "t1": 100.0,
        **envelope,
    }
    try:
        head["digest"] = wire.digest(content)
    except ValueError:  # NaN in the content: no canonical form, any digest will do
        pass
    text = json.dumps({**head, "content": content}, allow_nan=True)
    return text.encode("utf-8", "surrogatepass")


def content_with(tags: list[str], **extra: Any) -> dict[str, Any]:
    c = wire.encode_content(
        [Reading(TAGS[0], 50_000_000_000, -60.0), Reading(TAGS[1], 50_001_000_000, -61.0)],
        boot="boot-1",
        offset_db=0.0,
    )
    c["readings"]["tags"] = tags
    c.update(extra)
    return c


async def post(client, path: str, data: bytes, headers: dict[str, str] | None = None):
    r = await client.post(path, data=data, headers={**(headers or {}), "Content-Type": "application/json"})
    return r.status, await r.json()


# ------------------------------------------------------------------ finding 3: one poison batch, one group


async def test_a_poison_batch_is_refused_alone_while_150_others_are_stored(api, tmp_path):
    await import_tags(api, tmp_path)
    good = await enrolled(api, tmp_path, "g0-a")
    bad = await enrolled(api, tmp_path, "g0-b")
    poison = raw_batch("g0-b", 0, content_with([TAGS[0], "ibeacon:\x00" + TAGS[1][8:]]))

    async def one_good(seq: int) -> int:
        r = await api.post("/v1/batches", json=batch_body("g0-a", seq, readings(20, t0_s=seq)), headers=good)
        return r.status

    statuses = await asyncio.gather(
        *(one_good(s) for s in range(75)),
        post(api, "/v1/batches", poison, bad),
        *(one_good(s) for s in range(75, 150)),
    )
    poison_status, poison_doc = statuses[75]
    good_statuses = statuses[:75] + statuses[76:]
    assert good_statuses == [200] * 150
    assert poison_status == 400, poison_doc
    # The strict JSON reader refuses the NUL before the wire parser sees it, and says where it is.
    assert poison_doc["error"]["field"] == "body"
    assert "content.readings.tags[1]: a string holds a NUL" in poison_doc["error"]["message"]
    counts = {c.board: c for c in await api.app[STORE].board_counts()}
    assert counts["g0-a"].batches_total == 150 and counts["g0-a"].readings_total == 150 * 20
    assert counts["g0-b"].batches_total == 0


# ------------------------------------------------------------------ finding 5: JSON a parser chokes on


async def test_deep_nesting_gets_400_on_every_endpoint(api, tmp_path):
    code = await add_board(api, tmp_path, "g1-a")
    deep = b'{"code": "' + code.encode() + b'", "fingerprint": {"x": ' + b"[" * DEEP + b"]" * DEEP + b"}}"
    status, doc = await post(api, "/v1/enroll", deep)
    assert status == 400 and doc["error"]["code"] == "bad_json", doc
    assert "deep" in doc["error"]["message"]
    auth = await enrolled(api, tmp_path, "g1-b")
    for path in ("/v1/batches", "/v1/heartbeat"):
        status, doc = await post(api, path, b"[" * DEEP + b"]" * DEEP, auth)
        assert status == 400 and doc["error"]["code"] == "bad_json", (path, doc)


@pytest.mark.parametrize("constant", ["NaN", "Infinity", "-Infinity", "1e999"])
async def test_nan_and_infinity_get_400_on_enroll_without_a_token(api, tmp_path, constant):
    code = await add_board(api, tmp_path, "g2-a")
    body = f'{{"code": "{code}", "fingerprint": {{"machine_id": "m", "temp": {constant}}}}}'.encode()
    status, doc = await post(api, "/v1/enroll", body)
    assert status == 400 and doc["error"]["code"] == "bad_json", doc
    assert "finite" in doc["error"]["message"] or "NaN" in doc["error"]["message"]


async def test_nan_in_unknown_content_and_telemetry_keys_gets_400(api, tmp_path):
    auth = await enrolled(api, tmp_path, "g2-b")
    c = content_with(TAGS[:2], extra=float("nan"))
    status, doc = await post(api, "/v1/batches", raw_batch("g2-b", 0, c), auth)
    assert status == 400, doc
    c = content_with(TAGS[:2], telemetry=[{"tag": TAGS[0], "t_ms": 50_000, "rssi_2m": float("nan")}])
    status, doc = await post(api, "/v1/batches", raw_batch("g2-b", 1, c), auth)
    assert status == 400, doc
    hb = b'{"boot": "boot-1", "stats": {"x": NaN}}'
    status, doc = await post(api, "/v1/heartbeat", hb, auth)
    assert status == 400, doc


@pytest.mark.parametrize(
    "tag",
    [
        "ibeacon:\ud800",  # a lone surrogate
        TAGS[0] + "\x00",
        "phone-of-visitor-42",
        "mac:aa:bb:cc:dd:ee:ff",  # not canonical (lower case)
        "x" * 150,
    ],
)
async def test_tags_outside_the_identity_grammar_get_400_naming_the_tag(api, tmp_path, tag):
    auth = await enrolled(api, tmp_path, "g2-c")
    status, doc = await post(api, "/v1/batches", raw_batch("g2-c", 0, content_with([TAGS[0], tag])), auth)
    assert status == 400, doc
    assert doc["error"]["field"] in ("content.readings.tags[1]", "body"), doc
    counts = {c.board: c for c in await api.app[STORE].board_counts()}
    assert counts["g2-c"].batches_total == 0


async def test_nul_in_heartbeat_and_enroll_strings_gets_400(api, tmp_path):
    auth = await enrolled(api, tmp_path, "g2-d")
    status, doc = await post(api, "/v1/heartbeat", b'{"boot": "boot-1", "stats": {"k": "a\\u0000b"}}', auth)
    assert status == 400, doc
    status, doc = await post(api, "/v1/heartbeat", b'{"boot": "bo\\u0000ot", "stats": {}}', auth)
    assert status == 400, doc
    code = await add_board(api, tmp_path, "g2-e")
    body = f'{{"code": "{code}", "fingerprint": {{"host": "a\\ud800b"}}}}'.encode()
    status, doc = await post(api, "/v1/enroll", body)
    assert status == 400, doc


# ------------------------------------------------------------------ finding 6: unregistered identities


async def test_unregistered_ids_are_dropped_and_counted_per_board(api, tmp_path):
    await import_tags(api, tmp_path)
    auth = await enrolled(api, tmp_path, "g3-a")
    stranger = "mac:C4:7A:10:00:2B:91"
    rs = readings(10) + [Reading(stranger, round(52e9 + i * 1e8), -70.0) for i in range(4)]
    r = await api.post("/v1/batches", json=batch_body("g3-a", 0, rs), headers=auth)
    assert r.status == 200, await r.text()
    doc = await r.json()
    assert doc["status"] == "stored" and doc["unregistered_readings"] == 4
    # Sent again (an ack lost on the way): nothing new stored, nothing counted twice.
    r = await api.post("/v1/batches", json=batch_body("g3-a", 0, rs), headers=auth)
    assert (await r.json())["status"] == "duplicate"
    store = api.app[STORE]
    rows = await store.readings(0, 4e9)
    assert len(rows.tag) == 10 and stranger not in set(rows.tag.tolist())
    assert stranger not in await store.list_tags(include_retired=True)
    kinds = [(e.kind, e.detail) for e in await store.events(board="g3-a")]
    assert kinds == [("unregistered_ids", {"readings": 4, "ids": 1, "epoch": "00112233aabbccdd", "seq": 0})]
    status = await (await api.get("/v1/status")).json()
    row = next(b for b in status["boards"] if b["name"] == "g3-a")
    assert row["unregistered_readings"] == 4


async def test_with_no_registry_every_canonical_id_is_kept(api, tmp_path):
    auth = await enrolled(api, tmp_path, "g3-b")
    r = await api.post("/v1/batches", json=batch_body("g3-b", 0, readings(6)), headers=auth)
    assert r.status == 200 and (await r.json())["unregistered_readings"] == 0
    assert len((await api.app[STORE].readings(0, 4e9)).tag) == 6


# ------------------------------------------------------------------ finding 7: readings anywhere in time


async def test_negative_send_time_is_refused(api, tmp_path):
    auth = await enrolled(api, tmp_path, "g4-a")
    r = await api.post("/v1/batches", json=batch_body("g4-a", 0, readings(3), t1=-1e15), headers=auth)
    assert r.status == 400 and (await r.json())["error"]["field"] == "t1"
    assert len((await api.app[STORE].readings(-1e300, 1e300)).tag) == 0


async def test_readings_outside_the_time_window_are_refused(aiohttp_client, tmp_path, clock, store_factory):
    store = await store_factory.open()
    limits = {"max_reading_age_hours": 2, "max_reading_ahead_seconds": 60}
    client = await make_client(aiohttp_client, tmp_path, clock, store=store, limits=limits)
    auth = await enrolled(client, tmp_path, "g4-b")
    # Send time 3 h after the readings: they map to 3 h before the collector's clock.
    r = await client.post(
        "/v1/batches", json=batch_body("g4-b", 0, readings(3), t1=50.0 + 3 * 3600), headers=auth
    )
    assert r.status == 400, await r.text()
    err = (await r.json())["error"]
    assert err["field"] == "content.readings.t0_ms" and "before" in err["message"]
    # A reading far in the board's future maps ahead of the collector's clock.
    rs = readings(2, t0_s=100.0) + [Reading(TAGS[0], round(100.0e9 + 7200e9), -60.0)]
    r = await client.post("/v1/batches", json=batch_body("g4-b", 1, rs, t1=100.0), headers=auth)
    assert r.status == 400
    err = (await r.json())["error"]
    assert err["field"] == "content.readings.dt_ms[2]" and "ahead" in err["message"]
    # 90 minutes old is inside the window.
    r = await client.post(
        "/v1/batches", json=batch_body("g4-b", 2, readings(3), t1=50.0 + 5400), headers=auth
    )
    assert r.status == 200
    assert len((await store.readings(0, 4e9)).tag) == 3


async def test_forged_clock_exchanges_are_dropped_not_applied(api, tmp_path, clock):
    auth = await enrolled(api, tmp_path, "g4-c")
    store = api.app[STORE]
    w = clock.time() - 200.0  # the honest board: collector = board + w
    for k in range(4):
        b = 200.0 + 10 * k
        ex = {"t1": b, "t2": w + b + 0.004, "t3": w + b + 0.005, "t4": b + 0.009}
        r = await api.post(
            "/v1/batches",
            json=batch_body("g4-c", k, readings(1, t0_s=b), t1=b + 0.01, clock=ex),
            headers=auth,
        )
        assert r.status == 200
    forged = [
        {"t1": 250.0, "t2": 9e15, "t3": 9e15, "t4": 250.01},  # collector stamps it never gave
        {"t1": 251.0, "t2": w + 251.0 + 0.01, "t3": w + 251.0, "t4": 251.02},  # t3 < t2 is a 400 already
    ] + [
        # Three agreeing exchanges 2 h off the fitted line: formerly a confirmed "step".
        {"t1": b, "t2": w + b - 7200.0, "t3": w + b - 7200.0 + 0.001, "t4": b + 0.01}
        for b in (252.0, 253.0, 254.0)
    ]
    refused = 0
    for i, ex in enumerate(forged):
        hb = {"boot": "boot-1", "t1": ex["t4"] + 0.5, "clock": ex, "stats": {}}
        r = await api.post("/v1/heartbeat", json=hb, headers=auth)
        if i == 1:
            assert r.status == 400 and (await r.json())["error"]["field"] == "clock.t3"
        else:
            assert r.status == 200, await r.text()
            refused += 1
    r = await api.post(
        "/v1/batches", json=batch_body("g4-c", 9, readings(1, t0_s=260.0), t1=261.0), headers=auth
    )
    assert r.status == 200
    rows = await store.readings(0, 1e300, boards=["g4-c"])
    assert rows.t_collector[-1] == pytest.approx(w + 260.0, abs=1e-2)
    assert len(await store.clock_samples("g4-c", "boot-1")) == 4
    status = await (await api.get("/v1/status")).json()
    row = next(b for b in status["boards"] if b["name"] == "g4-c")
    assert row["clock_exchanges_refused"] == refused and row["clock_steps"] == 0
