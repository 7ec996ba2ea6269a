"""A board turning silent, deaf or drifting is a warning in the log (and the journal), not routine info."""

from __future__ import annotations

from structlog.testing import capture_logs

from listenpost.collector.monitor import MONITOR
from tests.collector.test_api import enrolled, make_client, never_heard_from


async def test_a_board_going_silent_is_logged_at_warning(aiohttp_client, tmp_path, clock):
    client = await make_client(aiohttp_client, tmp_path, clock)
    await enrolled(client, tmp_path, "g0-a")
    await never_heard_from(client)
    with capture_logs() as logs:
        report = await client.app[MONITOR].run_once()
    assert [(e.board, e.detail["new"]) for e in report.changes] == [("g0-a", "silent")]
    changed = [e for e in logs if e["event"] == "board_state_changed"]
    assert [(e["board"], e["new"], e["log_level"]) for e in changed] == [("g0-a", "silent", "warning")]


async def test_a_board_enrolled_moments_ago_is_not_judged_until_it_speaks_or_stays_silent(
    aiohttp_client, tmp_path, clock
):
    """
    A round between a board's enrolment and its first request judges nothing (no false "silent" at a
    fleet's start). A board that speaks is first judged live; one that stays silent is judged silent
    once ``silent_after_s`` have passed since its enrolment.
    """
    client = await make_client(aiohttp_client, tmp_path, clock)
    monitor = client.app[MONITOR]
    talker = await enrolled(client, tmp_path, "g0-a")
    await enrolled(client, tmp_path, "g1-a", "G1 Light and Colour")
    assert (await monitor.run_once()).changes == []
    r = await client.post("/v1/heartbeat", json={"boot": "boot-1", "stats": {}}, headers=talker)
    assert r.status == 200, await r.text()
    await clock.advance(1.0)
    report = await monitor.run_once()
    assert [(e.board, e.detail["old"], e.detail["new"]) for e in report.changes] == [("g0-a", None, "live")]
    status = await (await client.get("/v1/status")).json()
    assert {b["name"]: b["state"] for b in status["boards"]}["g1-a"] == "unknown"
    await never_heard_from(client)
    report = await monitor.run_once()
    silent = [(e.board, e.detail["new"], e.detail["reason"]) for e in report.changes if e.board == "g1-a"]
    assert silent == [("g1-a", "silent", "no contact yet")]
