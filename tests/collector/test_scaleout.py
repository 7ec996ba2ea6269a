"""
Two collectors on one PostgreSQL database (docs/design.md §7): the run-once work is done by one of
them per round, and a batch posted to both at once is stored once.
"""

from __future__ import annotations

import asyncio
from pathlib import Path

from listenpost.collector.app import create_app
from listenpost.collector.monitor import MONITOR
from listenpost.collector.state import STORE
from listenpost.collector.store import Event
from listenpost.core.clock import VirtualClock, settle
from tests.collector.conftest import StoreFactory
from tests.collector.test_api import admin_headers, batch_body, readings, settings_for


async def _pair(
    aiohttp_client, pg_factory: StoreFactory, tmp_path: Path, clock: VirtualClock, *, monitors: bool
):
    clients = []
    for name in ("a", "b"):
        store = await pg_factory.open()
        app = create_app(settings_for(tmp_path / name), clock=clock, store=store, run_monitor=monitors)
        clients.append(await aiohttp_client(app))
    return clients


async def _interval(clock: VirtualClock, *monitors) -> None:
    """One monitor interval of virtual time, then wait until every monitor's loop has run its round and
    sleeps again. The wait is real time (PostgreSQL round trips on loopback) and bounded; no assertion
    depends on how long it takes."""
    ran = [m.runtime.monitor_rounds for m in monitors]
    await clock.advance(5)
    for _ in range(3000):
        await settle()
        if all(m.runtime.monitor_rounds > n for m, n in zip(monitors, ran, strict=True)):
            if clock.pending_sleepers >= len(monitors):
                return
        await asyncio.sleep(0.005)
    raise AssertionError(
        f"monitor rounds did not finish: {[m.runtime.monitor_rounds for m in monitors]} {ran}"
    )


# pg_factory comes first so the apps (and their monitors) stop before the factory closes the stores.
async def test_a_batch_posted_to_both_collectors_at_once_is_stored_once(
    pg_factory, aiohttp_client, tmp_path, clock
):
    a, b = await _pair(aiohttp_client, pg_factory, tmp_path, clock, monitors=False)
    r = await a.post(
        "/v1/admin/boards",
        json={"name": "g3-a", "room": "G3 Weather Hall"},
        headers=admin_headers(tmp_path / "a"),
    )
    code = (await r.json())["code"]
    r = await b.post("/v1/enroll", json={"code": code, "fingerprint": {}})  # enrolled through the other one
    auth = {"Authorization": "Bearer " + (await r.json())["token"]}
    for seq in range(20):
        body = batch_body("g3-a", seq, readings(50, t0_s=10.0 * seq))
        ra, rb = await asyncio.gather(
            a.post("/v1/batches", json=body, headers=auth), b.post("/v1/batches", json=body, headers=auth)
        )
        assert (ra.status, rb.status) == (200, 200)
        outcomes = sorted([(await ra.json())["status"], (await rb.json())["status"]])
        assert outcomes == ["duplicate", "stored"], outcomes
    counts = {c.board: c for c in await a.app[STORE].board_counts()}
    assert counts["g3-a"].readings_total == 20 * 50 and counts["g3-a"].batches_total == 20
    rows = await b.app[STORE].readings(0, 4e9)
    assert len(rows.tag) == 1000


async def test_one_collector_leads_the_monitor_and_the_other_takes_over(
    pg_factory, aiohttp_client, tmp_path, clock
):
    a, b = await _pair(aiohttp_client, pg_factory, tmp_path, clock, monitors=True)
    for name in ("g0-a", "u0-a"):
        r = await a.post(
            "/v1/admin/boards", json={"name": name, "room": "G0 Foyer"}, headers=admin_headers(tmp_path / "a")
        )
        r = await a.post("/v1/enroll", json={"code": (await r.json())["code"], "fingerprint": {}})
        assert r.status == 200
    ma, mb = a.app[MONITOR], b.app[MONITOR]
    for _ in range(12):  # 12 rounds of 5 s; u0-a never calls in, so it turns silent once
        await _interval(clock, ma, mb)
    assert {ma.rounds_led > 0, mb.rounds_led > 0} == {True, False}, (ma.rounds_led, mb.rounds_led)
    leader, follower, leader_client = (ma, mb, a) if ma.rounds_led else (mb, ma, b)
    assert leader.rounds_led >= 10
    events: list[Event] = await a.app[STORE].events()
    changes = [(e.board, e.detail["new"]) for e in events if e.kind == "state_changed"]
    assert len(changes) == len(set(changes)), changes  # evaluated once per round: no change reported twice
    # The follower shows the leader's verdicts.
    assert follower.runtime.states["u0-a"]["state"] == leader.runtime.states["u0-a"]["state"]
    # The leader goes away; its lock is released and the follower leads from its next round.
    await leader.stop()
    await leader_client.app[STORE].close()
    before = follower.rounds_led
    for _ in range(4):
        await _interval(clock, follower)
    assert follower.rounds_led > before
