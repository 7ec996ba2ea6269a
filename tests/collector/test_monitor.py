"""
The monitor's untested paths on a real collector: the webhook against a real loopback receiver,
loss events from seq holes, retention in bounded chunks. Virtual time throughout; the only real
waits are short, bounded polls for loopback I/O to finish.
"""

from __future__ import annotations

import asyncio
import io
import json
from collections.abc import AsyncIterator, Callable
from pathlib import Path
from typing import Any

import pytest
from aiohttp import web
from aiohttp.test_utils import TestClient
from structlog.testing import capture_logs

from listenpost.cli import main
from listenpost.collector.monitor import MONITOR
from listenpost.collector.state import STORE
from listenpost.collector.store import Event, Store
from listenpost.core.clock import VirtualClock
from listenpost.core.logs import configure
from tests.collector.conftest import StoreFactory, require_pg
from tests.collector.test_api import (
    batch_body,
    enrolled,
    import_tags,
    make_client,
    never_heard_from,
    readings,
)


async def until(cond: Callable[[], bool], what: str, seconds: float = 30.0) -> None:
    """Poll ``cond`` while real loopback I/O finishes; fail naming ``what`` after ``seconds``."""
    loop = asyncio.get_running_loop()
    end = loop.time() + seconds
    while not cond():
        if loop.time() > end:
            pytest.fail(f"timed out waiting for {what}")
        await asyncio.sleep(0.002)


# ------------------------------------------------------------------ webhook


class Receiver:
    """A webhook receiver that answers successive attempts by ``plan`` (then 200), on a real server."""

    def __init__(self, clock: VirtualClock, plan: list[str]) -> None:
        self.clock = clock
        self.plan = list(plan)
        self.arrivals: list[tuple[float, dict[str, Any], str | None]] = []
        """(virtual time, JSON body, Idempotency-Key) per attempt that reached the handler."""
        self.accepted: list[dict[str, Any]] = []
        self.release = asyncio.Event()
        """Set at the end of a test to let stalled handlers finish."""

    async def handle(self, request: web.Request) -> web.StreamResponse:
        body = await request.json()
        self.arrivals.append((self.clock.time(), body, request.headers.get("Idempotency-Key")))
        what = self.plan.pop(0) if self.plan else "ok"
        if what == "500":
            return web.json_response({"error": "receiver down"}, status=500)
        if what == "400":
            return web.json_response({"error": "no thanks"}, status=400)
        if what == "stall":
            await self.release.wait()
            return web.Response(status=503)  # far too late: the sender has given this attempt up
        if what == "reset":
            assert request.transport is not None
            request.transport.abort()  # RST, no answer at all
            await self.release.wait()
            return web.Response(status=503)
        self.accepted.append(body)
        return web.json_response({"ok": True})


@pytest.fixture
async def receiver_factory(aiohttp_server, clock):
    made: list[Receiver] = []

    async def make(plan: list[str]) -> tuple[Receiver, str]:
        rec = Receiver(clock, plan)
        app = web.Application()
        app.router.add_post("/hook", rec.handle)
        server = await aiohttp_server(app)
        made.append(rec)
        return rec, str(server.make_url("/hook"))

    yield make
    for rec in made:
        rec.release.set()


async def hooked_collector(
    aiohttp_client, tmp_path: Path, clock: VirtualClock, url: str, **webhook: Any
) -> TestClient:
    client = await make_client(
        aiohttp_client,
        tmp_path,
        clock,
        webhook={"url": url, "timeout_seconds": 3, "backoff_seconds": 1, **webhook},
    )
    client.app[MONITOR].start_webhook()
    return client


def count(logs: list[dict[str, Any]], event: str) -> int:
    return sum(1 for e in logs if e["event"] == event)


async def test_webhook_retries_500_stall_and_reset_then_delivers_once(
    aiohttp_client, receiver_factory, tmp_path, clock
):
    """Backoff 1, 2, 4 s on the injected clock; the stalled attempt ends at the 3 s timeout; one delivery."""
    rec, url = await receiver_factory(["500", "stall", "reset"])
    client = await hooked_collector(aiohttp_client, tmp_path, clock, url, attempts=5)
    await enrolled(client, tmp_path, "g0-a")
    await never_heard_from(client)
    monitor = client.app[MONITOR]
    with capture_logs() as logs:
        t0 = clock.time()
        report = await monitor.run_once()
        assert [(e.board, e.detail["new"]) for e in report.changes] == [
            ("g0-a", "silent")
        ]  # enrolled, never heard
        await until(lambda: count(logs, "webhook_retry") == 1, "the 500 to be retried")
        await clock.advance(1)  # backoff 1 s → attempt 2 stalls
        await until(lambda: len(rec.arrivals) == 2, "the second attempt")
        # The stall holds up nothing else: another round runs and stores its events meanwhile.
        await asyncio.wait_for(monitor.run_once(), 5)
        await clock.advance(3)  # the per-attempt timeout passes on the clock
        await until(lambda: count(logs, "webhook_retry") == 2, "the timed-out attempt to be retried")
        await clock.advance(2)  # backoff 2 s → attempt 3 is reset
        await until(lambda: count(logs, "webhook_retry") == 3, "the reset attempt to be retried")
        await clock.advance(4)  # backoff 4 s → attempt 4 is accepted
        await until(lambda: monitor.webhook_sent == 1, "the delivery")
    assert [round(t - t0, 6) for t, _, _ in rec.arrivals] == [0, 1, 1 + 3 + 2, 1 + 3 + 2 + 4]
    event = report.changes[0]
    expected = {
        "id": event.id,
        "at": event.at,
        "board": "g0-a",
        "kind": "state_changed",
        "detail": {"old": None, "new": "silent", "reason": "no contact yet"},
    }
    assert rec.accepted == [expected]
    assert {key for _, _, key in rec.arrivals} == {f"listenpost-event-{event.id}"}
    retries = [e for e in logs if e["event"] == "webhook_retry"]
    assert [e["retry_in_s"] for e in retries] == [1, 2, 4]
    assert retries[0]["error"] == "HTTP 500" and retries[1]["error"].startswith("TimeoutError")
    assert "Disconnected" in retries[2]["error"] or "Connection" in retries[2]["error"]
    assert monitor.webhook_failed == 0 and count(logs, "webhook_failed") == 0


async def test_webhook_gives_up_after_the_bound_and_logs_it(
    aiohttp_client, receiver_factory, tmp_path, clock
):
    """A receiver that never accepts gets exactly ``attempts`` POSTs; the event stays in the store."""
    rec, url = await receiver_factory(["500"] * 10)
    client = await hooked_collector(aiohttp_client, tmp_path, clock, url, attempts=3)
    await enrolled(client, tmp_path, "g0-a")
    await never_heard_from(client)
    monitor = client.app[MONITOR]
    with capture_logs() as logs:
        t0 = clock.time()
        await monitor.run_once()
        for k in (1, 2):
            await until(lambda k=k: count(logs, "webhook_retry") == k, f"retry {k}")
            await clock.advance(2 ** (k - 1))
        await until(lambda: count(logs, "webhook_failed") == 1, "the give-up")
        await clock.advance(600)  # nothing more is tried, however long we wait
    assert [round(t - t0, 6) for t, _, _ in rec.arrivals] == [0, 1, 3]
    failed = next(e for e in logs if e["event"] == "webhook_failed")
    assert failed["attempts"] == 3 and failed["error"] == "HTTP 500" and failed["board"] == "g0-a"
    assert monitor.webhook_failed == 1 and monitor.webhook_sent == 0 and rec.accepted == []
    assert [e.kind for e in await client.app[STORE].events()] == ["state_changed"]


async def test_webhook_4xx_is_not_retried_and_the_next_event_still_goes(
    aiohttp_client, receiver_factory, tmp_path, clock
):
    """400 means the receiver will never take this body: give it up at once and go on with the next."""
    rec, url = await receiver_factory(["400"])
    client = await hooked_collector(aiohttp_client, tmp_path, clock, url, attempts=4)
    await enrolled(client, tmp_path, "g0-a")
    await enrolled(client, tmp_path, "g1-a", "G1 Light and Colour")
    await never_heard_from(client)
    monitor = client.app[MONITOR]
    with capture_logs() as logs:
        await monitor.run_once()
        await until(lambda: monitor.webhook_sent == 1, "the second event")
    assert len(rec.arrivals) == 2 and [a["board"] for a in rec.accepted] == ["g1-a"]
    assert count(logs, "webhook_retry") == 0 and count(logs, "webhook_failed") == 1


async def test_a_transition_stored_already_is_neither_stored_again_nor_sent(
    aiohttp_client, receiver_factory, tmp_path, clock
):
    """Another writer stored this very change (board, transition, time): one row, no POST from here."""
    rec, url = await receiver_factory([])
    client = await hooked_collector(aiohttp_client, tmp_path, clock, url)
    await enrolled(client, tmp_path, "g0-a")
    await enrolled(client, tmp_path, "g1-a", "G1 Light and Colour")
    await never_heard_from(client)
    store, monitor = client.app[STORE], client.app[MONITOR]
    at = clock.time()
    # The key the monitor gives a state change (collector/monitor.py, `_liveness`).
    theirs = Event(
        at,
        "g0-a",
        "state_changed",
        {"old": None, "new": "silent"},
        key=f"state_changed/g0-a/None>silent@{at!r}",
    )
    first = await store.add_event(theirs)
    report = await monitor.run_once()
    assert [e.board for e in report.changes] == ["g1-a"]
    await until(lambda: monitor.webhook_sent == 1, "the one new event to be sent")
    # g0-a sorts first, so had its change been queued too it would have been the one sent.
    assert [a["board"] for a in rec.accepted] == ["g1-a"] and len(rec.arrivals) == 1
    changes = [(e.board, e.id) for e in await store.events() if e.kind == "state_changed"]
    assert changes == [("g0-a", first), ("g1-a", report.changes[0].id)]


# ------------------------------------------------------------------ loss events


async def _send(client: TestClient, auth: dict[str, str], board: str, seq: int, **kw: Any) -> None:
    r = await client.post(
        "/v1/batches", json=batch_body(board, seq, readings(0 if kw.get("gap") else 4), **kw), headers=auth
    )
    assert r.status == 200, await r.text()


async def test_seq_holes_become_loss_events_once_and_show_in_cli_and_page(
    aiohttp_client, tmp_path, clock, capsys
):
    """A hole not covered by a gap record or a dead letter is a loss after the grace period, once."""
    from listenpost.collector.monitor import LOSS_GRACE_SECONDS

    client = await make_client(aiohttp_client, tmp_path, clock)
    await import_tags(client, tmp_path)
    auth = await enrolled(client, tmp_path, "g2-a", "G2 Sound Lab")
    # seq 0, 1 stored; 2-4 missing; 5 stored; a gap record (seq 6) covers 7-8 (spool overflow);
    # 9 a dead letter reported the same way; 10 stored; 11 missing; 12 stored.
    for seq in (0, 1, 5, 10, 12):
        await _send(client, auth, "g2-a", seq)
    await _send(
        client, auth, "g2-a", 6, gap={"first_seq": 7, "last_seq": 8, "readings": 90, "reason": "spool_full"}
    )
    await _send(
        client, auth, "g2-a", 13, gap={"first_seq": 9, "last_seq": 9, "readings": 4, "reason": "dead_letter"}
    )
    monitor = client.app[MONITOR]
    first = await monitor.run_once()
    assert first.losses == []  # inside the grace period: a batch may be just arriving
    await clock.advance(LOSS_GRACE_SECONDS / 2)
    await _send(client, auth, "g2-a", 11)  # arrived late after all: not a loss
    await clock.advance(LOSS_GRACE_SECONDS / 2)
    second = await monitor.run_once()
    assert [(e.board, e.detail) for e in second.losses] == [
        ("g2-a", {"epoch": "00112233aabbccdd", "first_seq": 2, "last_seq": 4, "batches": 3})
    ]
    for _ in range(3):
        await clock.advance(10)
        assert (await monitor.run_once()).losses == []  # once per hole, not every round
    # A restarted collector (fresh monitor on the same store) does not announce it again,
    # nor the part of it that remains after a late batch splits it.
    await _send(client, auth, "g2-a", 3)
    fresh = type(monitor)(client.app[STORE], clock=clock, settings=monitor.settings, runtime=monitor.runtime)
    await fresh.run_once()
    await clock.advance(LOSS_GRACE_SECONDS + 1)
    assert (await fresh.run_once()).losses == []
    losses = [e for e in await client.app[STORE].events() if e.kind == "loss"]
    assert len(losses) == 1

    # The events command lists it ...
    configure("json", stream=io.StringIO())  # the server's log lines stay out of the CLI's stdout
    capsys.readouterr()
    url = str(client.make_url("")).rstrip("/")
    args = ["collector", "events", "--json", "--collector", url, "--state-dir", str(tmp_path)]
    assert await asyncio.to_thread(main, args) == 0
    listed = [e for e in json.loads(capsys.readouterr().out)["events"] if e["kind"] == "loss"]
    assert [(e["board"], e["detail"]["first_seq"], e["detail"]["last_seq"]) for e in listed] == [
        ("g2-a", 2, 4)
    ]
    assert await asyncio.to_thread(main, args[:2] + args[3:]) == 0
    assert any(" loss " in ln and "g2-a" in ln for ln in capsys.readouterr().out.splitlines())
    # ... and so does the health page, with the seqs.
    html = await (await client.get("/")).text()
    assert "loss" in html and "batches 2–4 lost" in html


# ------------------------------------------------------------------ retention


async def _old_and_new(client: TestClient, tmp_path: Path, clock: VirtualClock, old: int, new: int) -> None:
    """``old`` readings stamped 100 days ago and ``new`` ones from now, in batches of 50."""
    await import_tags(client, tmp_path)
    auth = await enrolled(client, tmp_path, "g3-a", "G3 Weather Hall")
    seq = 0
    for n, t1 in ((old, 100.0), (new, 100.0 + 100 * 86400)):
        for k in range(0, n, 50):
            body = batch_body("g3-a", seq, readings(min(50, n - k), t0_s=t1 - 40), t1=t1)
            # t1 stands for the send time: without a clock fit, collector time = board time + (t2 − t1),
            # so readings sent "100 days before now" land 100 days in the past.
            body["t1"] = t1 + (100 * 86400 if t1 == 100.0 else 0)
            r = await client.post("/v1/batches", json=body, headers=auth)
            assert r.status == 200, await r.text()
            seq += 1


async def _stored(client: TestClient) -> int:
    rows = await client.app[STORE].readings(0, 1e12)
    return len(rows.t_collector)


@pytest.fixture(params=["sqlite", "postgres"])
async def any_store(request, tmp_path) -> AsyncIterator[Store | None]:
    """None (the app opens its own SQLite file) or a store on a fresh PostgreSQL schema."""
    if request.param == "sqlite":
        yield None
        return
    await require_pg()
    factory = StoreFactory("postgres", tmp_path)
    try:
        yield await factory.open()
    finally:
        await factory.cleanup()


# any_store comes first so the app stops before its store closes.
async def test_retention_runs_in_bounded_chunks_across_rounds(any_store, aiohttp_client, tmp_path, clock):
    """1000 old readings, 150 per chunk, 2 chunks per round: 300, 300, 300, 100 — and the new ones stay.
    On PostgreSQL their day lies wholly before the cut: it is dropped whole in the first round, counted."""
    from listenpost.collector.monitor import RETENTION_CHUNKS_PER_ROUND

    client = await make_client(
        aiohttp_client, tmp_path, clock, store=any_store, retention={"days": 90, "chunk": 150}
    )
    await _old_and_new(client, tmp_path, clock, old=1000, new=200)
    assert await _stored(client) == 1200
    monitor = client.app[MONITOR]
    deleted = []
    for _ in range(6):
        deleted.append((await monitor.run_once()).deleted)
        await clock.advance(5)
    per_round = 150 * RETENTION_CHUNKS_PER_ROUND
    if any_store is None:
        assert deleted == [per_round, per_round, per_round, 1000 - 3 * per_round, 0, 0]
    else:
        assert deleted == [1000, 0, 0, 0, 0, 0]
    assert await _stored(client) == 200
    assert (await client.app[STORE].board_counts())[0].batches_total == 24  # dedup keys stay


async def test_retention_only_by_the_lock_holder(aiohttp_client, tmp_path, clock):
    """While another holder has the monitor lock, a round deletes nothing."""
    client = await make_client(aiohttp_client, tmp_path, clock, retention={"days": 90, "chunk": 100})
    await _old_and_new(client, tmp_path, clock, old=300, new=50)
    store = client.app[STORE]
    monitor = client.app[MONITOR]
    async with store.exclusive("monitor") as held:
        assert held
        report = await monitor.run_once()
        assert not report.held_lock and report.deleted == 0
    assert await _stored(client) == 350
    assert [(await monitor.run_once()).deleted for _ in range(3)] == [
        200,
        100,
        0,
    ]  # 2 chunks of 100 per round
    assert await _stored(client) == 50


async def test_retention_ages_out_history_but_batch_keys_only_after_their_readings(
    any_store, aiohttp_client, tmp_path, clock
):
    """Heartbeats and clock samples past their age go (the newest stays); batch keys go past theirs but
    never before a day after their readings' cut, and not while old readings are still being deleted."""
    from listenpost.collector.monitor import history_cuts
    from listenpost.collector.store import ClockSample, Heartbeat
    from tests.collector.test_store import add_boards, make_batch

    retention = {"days": 90, "chunk": 100, "heartbeat_days": 7, "clock_sample_days": 7, "batch_key_days": 30}
    client = await make_client(aiohttp_client, tmp_path, clock, store=any_store, retention=retention)
    store, monitor = client.app[STORE], client.app[MONITOR]
    now = clock.time()
    await add_boards(store, "g3-a")
    for days in (100, 40, 10, 1):
        at = now - days * 86400
        await store.add_heartbeat(Heartbeat("g3-a", at, "boot-1", {}))
        await store.add_clock_sample(ClockSample("g3-a", "boot-1", 1.0, at, at, 1.1))
        await store.ingest(make_batch("g3-a", days, n=1, t0=at - days, received_at=at))
    await store.ingest(make_batch("g3-a", 200, n=1, t0=now - 1, received_at=now))
    report = await monitor.run_once()
    assert report.history_deleted == {"heartbeats": 3, "clock_samples": 3, "batches": 1}
    assert [h.at for h in await store.heartbeats("g3-a", 0.0)] == [now - 86400]
    assert len(await store.clock_samples("g3-a", "boot-1")) == 1
    assert (await store.ingest(make_batch("g3-a", 40, n=1, t0=now - 40 * 86400 - 40))).status.value == (
        "duplicate"  # 40 days old: past 30, but not past the readings' 90 (+1)
    )
    s = monitor.settings
    assert history_cuts(s, now, readings_backlog=True)["batches"] is None
    assert history_cuts(s, now, readings_backlog=False)["batches"] == now - 91 * 86400
