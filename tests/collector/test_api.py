"""The board API on a real aiohttp server with a real SQLite file and a virtual clock."""

from __future__ import annotations

import gzip
import json
import secrets
from pathlib import Path
from typing import Any

import pytest
from aiohttp.test_utils import TestClient

from listenpost.collector.app import create_app
from listenpost.collector.config import parse_settings
from listenpost.collector.http.auth import ADMIN_TOKEN_FILE
from listenpost.collector.state import CLOCK, STORE
from listenpost.collector.status import liveness_limits
from listenpost.collector.store import Store, StoreUnavailable, open_store
from listenpost.core import wire
from listenpost.core.clock import VirtualClock
from listenpost.core.records import Reading

IBEACON_UUID = "4d2a0c1e-7f3b-4c55-9e61-2b8f0a7d3c10"
TAGS = [f"ibeacon:{IBEACON_UUID}:7:{i}" for i in range(1, 6)] + ["lpx:00000007"]
LPX_RULE = {"name": "lpx", "company_id": 0xFFFF, "prefix": "4c50", "offset": 2, "length": 4}


# ------------------------------------------------------------------ helpers shared by the collector tests


def settings_for(state_dir: Path, **yaml_overrides: Any):
    data = {"decode": {"rules": [LPX_RULE]}, **yaml_overrides}
    return parse_settings(data, "test.yaml", state_dir=str(state_dir))


async def make_client(
    aiohttp_client,
    tmp_path: Path,
    clock: VirtualClock,
    *,
    store: Store | None = None,
    run_monitor: bool = False,
    **yaml_overrides: Any,
) -> TestClient:
    app = create_app(
        settings_for(tmp_path, **yaml_overrides), clock=clock, store=store, run_monitor=run_monitor
    )
    return await aiohttp_client(app)


def admin_headers(tmp_path: Path) -> dict[str, str]:
    return {"Authorization": "Bearer " + (tmp_path / ADMIN_TOKEN_FILE).read_text().strip()}


async def add_board(
    client: TestClient, tmp_path: Path, name: str, room: str = "G0 Foyer", floor: str | None = "ground"
) -> str:
    r = await client.post(
        "/v1/admin/boards", json={"name": name, "room": room, "floor": floor}, headers=admin_headers(tmp_path)
    )
    assert r.status == 201, await r.text()
    return (await r.json())["code"]


async def enrolled(
    client: TestClient,
    tmp_path: Path,
    name: str,
    room: str = "G0 Foyer",
    fingerprint: dict[str, Any] | None = None,
) -> dict[str, str]:
    """Add and enroll a board (floor from the room's letter, as in docs/demo-venue.md); returns its auth header."""
    code = await add_board(client, tmp_path, name, room, "upper" if room.startswith("U") else "ground")
    r = await client.post(
        "/v1/enroll", json={"code": code, "fingerprint": fingerprint or {"machine_id": name}}
    )
    assert r.status == 200, await r.text()
    return {"Authorization": "Bearer " + (await r.json())["token"]}


async def never_heard_from(client: TestClient) -> None:
    """Let ``liveness.silent_after_s`` pass on the collector's clock: boards enrolled and silent since are
    judged silent by the next monitor round (before that they are not yet judged)."""
    await client.app[CLOCK].advance(liveness_limits(client.app).silent_after_s)  # type: ignore[attr-defined]


async def import_tags(client: TestClient, tmp_path: Path, tags: list[str] = TAGS) -> None:
    r = await client.post("/v1/admin/tags", json={"ids": tags}, headers=admin_headers(tmp_path))
    assert r.status == 200, await r.text()


def batch_body(
    board: str,
    seq: int,
    readings: list[Reading],
    *,
    epoch: str = "00112233aabbccdd",
    boot: str = "boot-1",
    t1: float = 100.0,
    clock: dict[str, float] | None = None,
    offset_db: float = 0.0,
    gap: dict[str, Any] | None = None,
) -> dict[str, Any]:
    content = wire.encode_content(readings, boot=boot, offset_db=offset_db, gap=gap)
    return {
        "v": 1,
        "board": board,
        "boot": boot,
        "epoch": epoch,
        "seq": seq,
        "digest": wire.digest(content),
        "clock": clock,
        "t1": t1,
        "content": content,
    }


def readings(n: int, t0_s: float = 50.0, tags: list[str] = TAGS) -> list[Reading]:
    return [
        Reading(tags[i % len(tags)], round((t0_s + i * 0.25) * 1e9), -60.0 - (i % 30) / 2) for i in range(n)
    ]


def gz(obj: Any) -> bytes:
    return gzip.compress(json.dumps(obj).encode())


@pytest.fixture
async def client(aiohttp_client, tmp_path: Path, clock: VirtualClock) -> TestClient:
    return await make_client(aiohttp_client, tmp_path, clock)


# ------------------------------------------------------------------ enroll


async def test_enroll_gives_a_token_and_config_once(client, tmp_path, clock):
    await import_tags(client, tmp_path)
    code = await add_board(client, tmp_path, "g0-a")
    r = await client.post(
        "/v1/enroll", json={"code": code.lower().replace("-", " "), "fingerprint": {"machine_id": "m1"}}
    )
    assert r.status == 200
    doc = await r.json()
    assert doc["board"] == "g0-a"
    assert len(doc["token"]) >= 43  # 32 bytes of URL-safe base64
    assert doc["config"]["tags"] == sorted(TAGS)
    assert doc["config"]["rules"] == [LPX_RULE]
    # The token works; the code does not work twice.
    r = await client.get("/v1/config", headers={"Authorization": f"Bearer {doc['token']}"})
    assert r.status == 200
    r = await client.post("/v1/enroll", json={"code": code, "fingerprint": {}})
    assert r.status == 409
    assert (await r.json())["error"]["field"] == "code"
    # The store keeps the fingerprint and never the token itself.
    store = client.app[STORE]
    assert (await store.get_board("g0-a")).fingerprint == {"machine_id": "m1"}
    assert doc["token"].encode() not in Path(store.path).read_bytes()  # noqa: ASYNC240 (small file, test only)


async def test_enroll_unknown_expired_and_bad_input(client, tmp_path, clock):
    r = await client.post("/v1/enroll", json={"code": "AAAA-BBBB-CCCC-DDDD", "fingerprint": {}})
    assert r.status == 404
    code = await add_board(client, tmp_path, "g1-a")
    await clock.advance(72 * 3600 + 1)  # default code lifetime is 72 h
    r = await client.post("/v1/enroll", json={"code": code, "fingerprint": {}})
    assert r.status == 410
    r = await client.post("/v1/enroll", json={"code": 17})
    assert r.status == 400 and (await r.json())["error"]["field"] == "code"
    r = await client.post("/v1/enroll", data=b"{not json", headers={"Content-Type": "application/json"})
    assert r.status == 400 and (await r.json())["error"]["field"] == "body"


async def test_reissue_replaces_the_code_and_a_new_fingerprint_is_flagged(client, tmp_path, clock):
    old = await add_board(client, tmp_path, "g2-a")
    r = await client.post("/v1/enroll", json={"code": old, "fingerprint": {"machine_id": "card-1"}})
    assert r.status == 200
    r = await client.post("/v1/admin/boards/g2-a/reissue", headers=admin_headers(tmp_path))
    new = (await r.json())["code"]
    assert new != old
    r = await client.post("/v1/enroll", json={"code": new, "fingerprint": {"machine_id": "card-2"}})
    assert r.status == 200
    evs = (await (await client.get("/v1/admin/events", headers=admin_headers(tmp_path))).json())["events"]
    assert [e["kind"] for e in evs] == ["fingerprint_changed"]
    assert evs[0]["detail"]["keys"] == ["machine_id"]


# ------------------------------------------------------------------ config


async def test_config_etag_and_304(client, tmp_path, clock):
    auth = await enrolled(client, tmp_path, "g3-a")
    r = await client.get("/v1/config", headers=auth)
    etag = r.headers["ETag"]
    doc = await r.json()
    assert set(doc) == {"board", "tags", "rules", "offset_db", "flush_seconds", "heartbeat_seconds"}
    r = await client.get("/v1/config", headers={**auth, "If-None-Match": etag})
    assert r.status == 304
    await import_tags(client, tmp_path, TAGS[:2])
    r = await client.get("/v1/config", headers={**auth, "If-None-Match": etag})
    assert r.status == 200 and r.headers["ETag"] != etag
    assert (await r.json())["tags"] == sorted(TAGS[:2])


async def test_board_calls_need_a_valid_token(client, tmp_path):
    assert (await client.get("/v1/config")).status == 401
    r = await client.get("/v1/config", headers={"Authorization": "Bearer " + secrets.token_urlsafe(32)})
    assert r.status == 401
    auth = await enrolled(client, tmp_path, "g4-a")
    await client.post("/v1/admin/boards/g4-a/retire", headers=admin_headers(tmp_path))
    r = await client.post("/v1/batches", json=batch_body("g4-a", 0, readings(3)), headers=auth)
    assert r.status == 403


# ------------------------------------------------------------------ batches


async def test_batch_stored_then_duplicate_then_conflict(client, tmp_path, clock):
    await import_tags(client, tmp_path)
    auth = await enrolled(client, tmp_path, "g0-a")
    body = batch_body("g0-a", 0, readings(40))
    t_before = clock.time()
    r = await client.post(
        "/v1/batches",
        data=gz(body),
        headers={**auth, "Content-Encoding": "gzip", "Content-Type": "application/json"},
    )
    assert r.status == 200, await r.text()
    doc = await r.json()
    assert doc["status"] == "stored" and doc["t2"] == t_before and doc["t3"] >= doc["t2"]
    r = await client.post("/v1/batches", json=body, headers=auth)
    assert (await r.json())["status"] == "duplicate"
    other = batch_body("g0-a", 0, readings(41))
    r = await client.post("/v1/batches", json=other, headers=auth)
    assert r.status == 409
    assert (await r.json())["error"]["code"] == "digest_conflict"
    store = client.app[STORE]
    counts = {c.board: c for c in await store.board_counts()}
    assert counts["g0-a"].readings_total == 40 and counts["g0-a"].batches_total == 1
    assert [e.kind for e in await store.events()] == ["digest_conflict"]


async def test_corrected_times_use_the_send_time_then_the_clock_model(client, tmp_path, clock):
    auth = await enrolled(client, tmp_path, "g1-a")
    store = client.app[STORE]
    # First batch of a boot: no exchange yet, so collector ≈ board + (t2 − t1).
    t2 = clock.time()
    r = await client.post(
        "/v1/batches", json=batch_body("g1-a", 0, readings(4, t0_s=90.0), t1=100.0), headers=auth
    )
    assert r.status == 200
    rows = await store.readings(0, 4e9, boards=["g1-a"])
    assert rows.t_collector[0] == pytest.approx(90.0 + (t2 - 100.0), abs=1e-6)
    # With exchanges the model maps board time; a board whose collector offset is exactly W.
    w = clock.time() - 200.0
    for k in range(5):
        b = 200.0 + 10 * k
        ex = {"t1": b, "t2": w + b + 0.004, "t3": w + b + 0.005, "t4": b + 0.009}
        r = await client.post(
            "/v1/batches", json=batch_body("g1-a", 1 + k, readings(2, t0_s=b), t1=b, clock=ex), headers=auth
        )
        assert r.status == 200
    r = await client.post(
        "/v1/batches", json=batch_body("g1-a", 9, readings(1, t0_s=260.0), t1=261.0), headers=auth
    )
    rows = await store.readings(0, 4e9, boards=["g1-a"])
    assert rows.t_collector[-1] == pytest.approx(w + 260.0, abs=1e-3)


@pytest.mark.parametrize(
    "mutate, field",
    [
        (lambda b: b.update(seq=-1), "seq"),
        (lambda b: b.update(v=2), "v"),
        (lambda b: b.update(epoch="XYZ"), "epoch"),
        (lambda b: b.update(digest="0" * 64), "digest"),
        (lambda b: b.pop("t1"), "t1"),
        (lambda b: b.update(clock={"t1": 1, "t2": 5, "t3": 4, "t4": 2}), "clock.t3"),
        (lambda b: b["content"]["readings"]["rssi_dd"].__setitem__(1, 9000), "content.readings.rssi_dd[1]"),
        (lambda b: b["content"]["readings"]["tag"].append(0), "content.readings"),
        (lambda b: b["content"].update(offset_db="x"), "content.offset_db"),
    ],
)
async def test_bad_batches_get_400_naming_the_field(client, tmp_path, mutate, field):
    auth = await enrolled(client, tmp_path, "g2-a")
    body = batch_body("g2-a", 3, readings(5))
    mutate(body)
    r = await client.post("/v1/batches", json=body, headers=auth)
    assert r.status == 400
    err = (await r.json())["error"]
    assert err["field"] == field, err
    counts = await client.app[STORE].board_counts()
    assert sum(c.readings_total for c in counts) == 0


async def test_posting_as_another_board_is_forbidden(client, tmp_path):
    auth = await enrolled(client, tmp_path, "g3-a")
    await enrolled(client, tmp_path, "g3-b")
    r = await client.post("/v1/batches", json=batch_body("g3-b", 0, readings(2)), headers=auth)
    assert r.status == 403 and (await r.json())["error"]["field"] == "board"


async def test_gap_record_is_stored_and_counted(client, tmp_path):
    auth = await enrolled(client, tmp_path, "g5-a")
    gap = {"first_seq": 0, "last_seq": 4, "readings": 1200, "reason": "spool_full"}
    r = await client.post("/v1/batches", json=batch_body("g5-a", 5, [], gap=gap), headers=auth)
    assert r.status == 200 and (await r.json())["status"] == "stored"
    counts = {c.board: c for c in await client.app[STORE].board_counts()}
    assert counts["g5-a"].gap_readings == 1200


async def test_oversized_bodies_get_413(aiohttp_client, tmp_path, clock):
    limits = {"max_body_bytes": 20_000, "max_decompressed_bytes": 200_000}
    client = await make_client(aiohttp_client, tmp_path, clock, limits=limits)
    auth = await enrolled(client, tmp_path, "g6-a")
    # A small gzip body that inflates past the decompressed limit (a gzip bomb in miniature).
    bomb = gzip.compress(b'{"pad": "' + b"a" * 1_000_000 + b'"}')
    assert len(bomb) < 20_000
    r = await client.post("/v1/batches", data=bomb, headers={**auth, "Content-Encoding": "gzip"})
    assert r.status == 413
    r = await client.post("/v1/batches", data=b"x" * 30_000, headers=auth)
    assert r.status == 413
    # Within limits still works.
    r = await client.post(
        "/v1/batches",
        data=gz(batch_body("g6-a", 0, readings(10))),
        headers={**auth, "Content-Encoding": "gzip"},
    )
    assert r.status == 200


class FailingStore:
    """The real store, except that ingest and heartbeats fail as a database outage would."""

    def __init__(self, inner: Store) -> None:
        self.inner = inner
        self.url = inner.url
        self.down = False

    async def ingest(self, batch):
        if self.down:
            raise StoreUnavailable("database is locked")
        return await self.inner.ingest(batch)

    def __getattr__(self, name):
        return getattr(self.inner, name)


async def test_store_outage_answers_503_with_retry_after(aiohttp_client, tmp_path, clock):
    inner = await open_store(f"sqlite:///{tmp_path / 'c.sqlite'}")
    store = FailingStore(inner)
    try:
        client = await make_client(aiohttp_client, tmp_path, clock, store=store)
        auth = await enrolled(client, tmp_path, "u0-a")
        store.down = True
        r = await client.post("/v1/batches", json=batch_body("u0-a", 0, readings(5)), headers=auth)
        assert r.status == 503
        assert int(r.headers["Retry-After"]) > 0
        store.down = False
        r = await client.post("/v1/batches", json=batch_body("u0-a", 0, readings(5)), headers=auth)
        assert (await r.json())["status"] == "stored"
    finally:
        await inner.close()


# ------------------------------------------------------------------ heartbeat


async def test_heartbeat_stores_stats_and_clock_and_reports_wall_error(client, tmp_path, clock):
    auth = await enrolled(client, tmp_path, "g4-a")
    r = await client.get("/v1/config", headers=auth)
    etag = r.headers["ETag"]
    w = clock.time() - 500.0  # collector = board + w
    for k in range(4):
        b = 500.0 + 10 * k
        ex = {"t1": b, "t2": w + b + 0.003, "t3": w + b + 0.004, "t4": b + 0.007}
        body = {
            "board": "g4-a",
            "boot": "boot-1",
            "t1": b + 0.01,
            "clock": ex,
            # This board's wall clock runs 3 h 12 min behind (g4-a of docs/demo-venue.md).
            "wall": w + b + 0.01 - 11520.0,
            "stats": {"adverts_total": 1000 + k, "spool": {"batches": 2}},
        }
        t2 = clock.time()
        r = await client.post("/v1/heartbeat", json=body, headers=auth)
        assert r.status == 200, await r.text()
        doc = await r.json()
        assert doc["t2"] == t2 and doc["t3"] >= t2 and doc["config_etag"] == etag
    store = client.app[STORE]
    hb = (await store.latest_heartbeats())["g4-a"]
    assert hb.stats["adverts_total"] == 1003
    assert hb.stats["wall_error_s"] == pytest.approx(-11520.0, abs=0.01)
    assert len(await store.clock_samples("g4-a", "boot-1")) == 4
    r = await client.post("/v1/heartbeat", json={"boot": "boot-1", "stats": []}, headers=auth)
    assert r.status == 400 and (await r.json())["error"]["field"] == "stats"


async def test_unknown_route_is_a_json_404(client):
    r = await client.get("/v1/nothing")
    assert r.status == 404
    assert (await r.json())["error"]["code"] == "not_found"
