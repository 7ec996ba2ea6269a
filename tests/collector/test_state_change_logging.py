"""A board turning silent, deaf or drifting is a warning in the log (and the journal), not routine info."""

from __future__ import annotations

from structlog.testing import capture_logs

from listenpost.collector.monitor import MONITOR
from tests.collector.test_api import enrolled, make_client


async def test_a_board_going_silent_is_logged_at_warning(aiohttp_client, tmp_path, clock):
    client = await make_client(aiohttp_client, tmp_path, clock)
    await enrolled(client, tmp_path, "g0-a")
    with capture_logs() as logs:
        report = await client.app[MONITOR].run_once()
    assert [(e.board, e.detail["new"]) for e in report.changes] == [("g0-a", "silent")]
    changed = [e for e in logs if e["event"] == "board_state_changed"]
    assert [(e["board"], e["new"], e["log_level"]) for e in changed] == [("g0-a", "silent", "warning")]
