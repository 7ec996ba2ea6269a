"""
The real agent uploading a committed recording to the real collector on loopback (AppRunner on
127.0.0.1, SQLite file under tmp_path), on virtual time.

What the collector stores for the board must be exactly what ``agent replay --dry-run`` says the
board would send for the same file, tags, decode rule and offset — same count, same multiset of
(tag, board time, RSSI). Then ``listenpost collector status --json`` (the real CLI against the running
server) shows the board live, and silent once its agent has stopped and the silence limit has passed.
"""

from __future__ import annotations

import json
from collections import Counter
from pathlib import Path

from listenpost.collector.models.liveness import LivenessSettings
from listenpost.core.clock import VirtualClock
from listenpost.demo.fleet import Fleet
from listenpost.sim.truth import read_truth
from tests.e2e.conftest import REPLAY_LOGS, cli_async, dry_run, dry_run_config, stored_readings

BOARD = "g3-a"


async def _state(fleet: Fleet) -> dict:
    code, out = await cli_async(
        ["collector", "status", "--json", "--collector", fleet.url, "--state-dir", str(fleet.state_dir)]
    )
    assert code == 0, out
    return {b["name"]: b for b in json.loads(out)["boards"]}[BOARD]


async def test_uploaded_readings_equal_the_dry_run_and_status_follows_the_board(
    tmp_path: Path, e2e_logs: Path
):
    venue = read_truth(REPLAY_LOGS)
    truth = venue.board(BOARD)
    expected = dry_run(
        truth.recording,
        venue.tags_file,
        dry_run_config(tmp_path / "dry.yaml", BOARD, venue.decode_rules),
        offset_db=0.0,
    )
    assert len(expected) > 20_000  # the committed recording: g3-a hears ~24 600 registered adverts in 10 min

    fleet = Fleet(venue, tmp_path / "run", VirtualClock(start=1000.0, wall=venue.start_wall), boards=[BOARD])
    try:
        await fleet.start()
        await fleet.run_until(venue.duration_s + 10.0, step_s=1.0)

        row = await _state(fleet)
        assert row["state"] == "live", row
        assert row["readings_total"] == len(expected)
        stored = stored_readings(fleet.state_dir / "collector.sqlite", BOARD)
        assert len(stored) == len(expected)
        assert Counter(stored) == Counter(expected)
        # The collector's clock fit of this board on virtual time: loopback exchanges take no virtual time.
        assert abs(row["clock_skew_ppm"] - truth.skew_ppm) < 0.5

        await fleet.boards[BOARD].stop()
        stopped_at = fleet.t_true()
        # The silence clock starts at the board's last contact (its last heartbeat or batch), which
        # may be up to one heartbeat period before the stop.
        last_contact = stopped_at - (await _state(fleet))["last_contact_age_s"]
        limits = LivenessSettings()
        assert stopped_at - last_contact <= limits.heartbeat_s + 1.0
        # Short of the hard floor the board may be late but never silent ...
        await fleet.run_until(last_contact + limits.min_silent_s - 2.0, step_s=1.0)
        assert (await _state(fleet))["state"] in ("live", "late")
        # ... and past the hard limit plus one monitor round it is silent.
        await fleet.run_until(stopped_at + limits.silent_after_s + 10.0, step_s=1.0)
        row = await _state(fleet)
        assert row["state"] == "silent", row
        assert row["readings_total"] == len(expected)  # the clean stop sent nothing twice
    finally:
        await fleet.close()
