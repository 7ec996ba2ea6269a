"""
An hour of the Brackenford venue (simulated) through the whole chain, on virtual time.

The simulator writes 60 minutes of recordings; the collector (real aiohttp on 127.0.0.1, real SQLite
file) and 16 real agents replay them over HTTP on loopback, each board on its own derived clock, the
virtual clock driven in 1 s steps with the fleet idle between steps (listenpost/fleet.py). One run
(module fixture) feeds every check:

- clock: each board's estimated skew within 5 ppm of the truth, offset within a few ms;
- faults flagged within 60 simulated seconds of when they happen, and never before (u3-a power cut at
  6 min → silent; g2-a radio hang at 4 min → deaf; u2-a +85 ppm → drifting once detectable), and no
  healthy board ever leaves ``live``;
- privacy: no identity of an unregistered device anywhere in the store;
- completeness: stored readings per board equal an independent ``agent replay --dry-run`` of its
  recording, cut at its fault;
- calibration watch: g3-b's antenna knocked at minute 20 (−6 dB) flagged within 15 minutes with its
  size within 2 dB, and no other board ever flagged;
- export: ``listenpost collector export`` with 1 s bins, strongest board's room vs the true room.
"""

from __future__ import annotations

import asyncio
import concurrent.futures
import contextlib
import gzip
import json
import multiprocessing
import re
import sqlite3
import sys
import time
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pytest
import structlog

from listenpost.collector.models.liveness import LivenessSettings
from listenpost.core.clock import VirtualClock
from listenpost.demo import DEMO_LIVENESS
from listenpost.demo.fleet import Fleet
from listenpost.demo.outcome import BoardSummary
from listenpost.sim.truth import Truth, read_truth
from tests.e2e.conftest import (
    all_text,
    cli_async,
    dry_run_config,
    dry_run_to_file,
    parse_dry_run,
    quiet_logs,
    state_changes,
    stored_counts,
    stored_readings,
)

# One fixture runs the whole hour: 4 to 7 minutes on this 2-core machine, so it runs in `make soak`.
pytestmark = [pytest.mark.soak, pytest.mark.timeout(1200)]

MINUTES = 60
AFTER_S = 30.0
"""Virtual seconds run past the recording's end, so the last batches land and a monitor round follows."""
STEP_S = 1.0
LIMIT_S = 60.0
"""Every fault must be flagged within this many simulated seconds (docs/design.md §1: "within a minute")."""


@dataclass
class HourRun:
    venue: Truth
    db: Path
    summary: dict[str, BoardSummary]
    changes: list[tuple[float, str, str | None, str]]
    export: Path
    dry_runs: dict[str, Path]
    noise: dict[str, set[str]]
    power_off_at: dict[str, float]
    first_exchange_t: dict[str, float]
    """Board → true time of its first stored clock exchange."""
    shifts: list[tuple[float, str, dict]]
    """(collector time, board, detail) of every stored calibration_shift event."""
    timings: dict[str, float] = field(default_factory=dict)


# ---------------------------------------------------------------- the run


def scan_noise(directory: str, registered_addresses: list[str], venue_uuid: str) -> dict[str, set[str]]:
    """
    Identities of unregistered devices in the recordings: their addresses, the UUIDs of
    iBeacon-format frames with another UUID, and manufacturer payloads of 12+ hex digits.
    (Module level so a separate process can run it while the fleet runs.)
    """
    line = re.compile(
        rb'"a":"([0-9A-F:]{17})","at":\d,"r":-?\d+(?:,"tx":-?\d+)?(?:,"m":\{"([0-9a-f]{4})":"([0-9a-f]*)")?'
    )
    reg = set(registered_addresses)
    addresses: set[str] = set()
    uuids: set[str] = set()
    payloads: set[str] = set()
    own = venue_uuid.replace("-", "")
    for path in sorted(Path(directory).glob("*.jsonl.gz")):
        for a, company, payload in line.findall(gzip.decompress(path.read_bytes())):
            address = a.decode()
            if address in reg:
                continue
            addresses.add(address)
            p = payload.decode()
            if company == b"004c" and p.startswith("0215") and len(p) >= 36 and p[4:36] != own:
                u = p[4:36]
                uuids.add(f"{u[:8]}-{u[8:12]}-{u[12:16]}-{u[16:20]}-{u[20:]}")
            if len(p) >= 12:
                payloads.add(p)
    return {"addresses": addresses, "uuids": uuids, "payloads": payloads}


async def _simulate(out: Path) -> None:
    proc = await asyncio.create_subprocess_exec(
        sys.executable,
        "-m",
        "listenpost",
        "sim",
        "brackenford",
        "--minutes",
        str(MINUTES),
        "--out",
        str(out),
        "--btsnoop-board",
        "none",
        stdout=asyncio.subprocess.DEVNULL,
        stderr=asyncio.subprocess.PIPE,
    )
    _, err = await asyncio.wait_for(proc.communicate(), timeout=300)
    assert proc.returncode == 0, err.decode()[-2000:]


def _dry_runs(venue: Truth, out: Path) -> dict[str, Path]:
    files = {}
    for b in venue.boards:
        cfg = dry_run_config(out / f"{b.name}.yaml", b.name, venue.decode_rules)
        files[b.name] = out / f"{b.name}.jsonl"
        dry_run_to_file(b.recording, venue.tags_file, cfg, files[b.name])
    return files


async def _run_hour(base: Path) -> HourRun:
    timings: dict[str, float] = {}
    t0 = time.perf_counter()
    sim_dir, dry_dir = base / "sim", base / "dry"
    dry_dir.mkdir()
    await _simulate(sim_dir)
    venue = read_truth(sim_dir)
    timings["simulate_s"] = time.perf_counter() - t0

    # The references run beside the fleet, in other processes (the fleet itself is one event loop).
    dry_task = asyncio.create_task(asyncio.to_thread(_dry_runs, venue, dry_dir))
    pool = concurrent.futures.ProcessPoolExecutor(1, mp_context=multiprocessing.get_context("spawn"))
    noise_fut = asyncio.get_running_loop().run_in_executor(
        pool,
        scan_noise,
        str(sim_dir),
        [t["address"] for t in venue.document["tags"].values()],
        venue.document["venue"]["ibeacon_uuid"],
    )

    t1 = time.perf_counter()
    fleet = Fleet(
        venue, base / "run", VirtualClock(start=1000.0, wall=venue.start_wall), liveness=DEMO_LIVENESS
    )
    try:
        await fleet.start()
        await fleet.run_until(venue.duration_s + AFTER_S, step_s=STEP_S)
        timings["fleet_run_s"] = time.perf_counter() - t1
        summary = {s.name: s for s in await fleet.summary()}
        t2 = time.perf_counter()
        export = base / "hour.npz"
        code, out = await cli_async(
            [
                "collector",
                "export",
                "--from",
                repr(venue.start_wall),
                "--to",
                repr(venue.start_wall + venue.duration_s),
                "--bin",
                "1",
                "--format",
                "npz",
                "--out",
                str(export),
                "--collector",
                fleet.url,
                "--state-dir",
                str(fleet.state_dir),
                "--timeout",
                "240",
            ]
        )
        assert code == 0, out
        timings["export_s"] = time.perf_counter() - t2
        power_off_at = dict(fleet.power_off_log)
    finally:
        await fleet.close()
    db = fleet.state_dir / "collector.sqlite"
    with contextlib.closing(sqlite3.connect(f"file:{db}?mode=ro", uri=True)) as con:
        first = dict(
            con.execute(
                "SELECT b.name, min(c.t2) FROM clock_samples c JOIN boards b ON b.id = c.board_id "
                "GROUP BY b.name"
            ).fetchall()
        )
        shifts = [
            (at, board, json.loads(detail))
            for at, board, detail in con.execute(
                "SELECT e.at, b.name, e.detail FROM events e JOIN boards b ON b.id = e.board_id "
                "WHERE e.kind = 'calibration_shift' ORDER BY e.id"
            )
        ]
    t3 = time.perf_counter()
    dry_runs = await dry_task
    noise = await noise_fut
    pool.shutdown()
    timings["waited_for_references_s"] = time.perf_counter() - t3
    timings["total_s"] = time.perf_counter() - t0
    return HourRun(
        venue=venue,
        db=db,
        summary=summary,
        changes=state_changes(db),
        export=export,
        dry_runs=dry_runs,
        noise=noise,
        power_off_at=power_off_at,
        first_exchange_t={b: t - venue.start_wall for b, t in first.items()},
        shifts=shifts,
        timings=timings,
    )


@pytest.fixture(scope="module")
def hour(tmp_path_factory: pytest.TempPathFactory) -> HourRun:
    base = tmp_path_factory.mktemp("hour")
    fh = quiet_logs(base / "e2e.log")
    try:
        run = asyncio.run(_run_hour(base))
    finally:
        fh.close()
        structlog.reset_defaults()
    print(f"\nhour run timings: { {k: round(v, 1) for k, v in run.timings.items()} }")
    return run


# ---------------------------------------------------------------- checks


def _t(run: HourRun, at: float) -> float:
    # The collector's virtual wall clock reads start_wall at the recording's start.
    return at - run.venue.start_wall


def test_skew_and_offset_estimates(hour: HourRun):
    errors = {}
    for name, s in hour.summary.items():
        # Every board estimates, u3-a included: it lived 6 minutes, past the clock model's 120 s
        # minimum span for a skew, so it is held to the same bound from its shorter history.
        assert s.skew_est_ppm is not None, name
        errors[name] = round(s.skew_est_ppm - s.skew_true_ppm, 3)
        assert abs(s.skew_est_ppm - s.skew_true_ppm) < 5.0, (name, s)
        # Loopback exchanges take no virtual time, so the offset is exact but for float rounding;
        # measured here: |error| below 0.01 ms for every board.
        assert s.offset_error_ms is not None and abs(s.offset_error_ms) < 1.0, (name, s)
    print(f"skew errors (ppm): {errors}")
    g4 = hour.summary["g4-a"]
    assert g4.wall_error_est_s == pytest.approx(g4.wall_error_true_s, abs=0.05)  # 3 h 12 min behind


def _first(run: HourRun, board: str, state: str) -> float | None:
    return next((_t(run, at) for at, b, _, new in run.changes if b == board and new == state), None)


def _left_live_before(run: HourRun, board: str, t: float) -> list[tuple[float, str]]:
    return [
        (_t(run, at), new)
        for at, b, _, new in run.changes
        if b == board and new != "live" and _t(run, at) < t
    ]


def test_faults_flagged_within_a_minute_and_never_before(hour: HourRun):
    delays = {}
    # u3-a: the power cut happens at its scheduled moment; silent must follow within a minute.
    cut = hour.power_off_at["u3-a"]
    assert cut == pytest.approx(360.0)
    silent = _first(hour, "u3-a", "silent")
    assert silent is not None and cut < silent <= cut + LIMIT_S, (cut, silent)
    assert not _left_live_before(hour, "u3-a", cut)
    delays["u3-a silent"] = silent - cut

    # g2-a: the radio hangs at minute 4 (its recording has no advert after that); deaf within a minute.
    hang = hour.venue.board("g2-a").radio_hang_at_s
    deaf = _first(hour, "g2-a", "deaf")
    assert deaf is not None and hang < deaf <= hang + LIMIT_S, (hang, deaf)
    assert not _left_live_before(hour, "g2-a", hang)
    delays["g2-a deaf"] = deaf - hang

    # u2-a: a crystal +85 ppm fast is wrong from the start but only *detectable* once the clock fit
    # spans the liveness rule's drift_min_span_s of board time (300 s): a skew estimated from less is
    # not trusted to accuse a board. So "when it happens" = first clock exchange + that span.
    span = LivenessSettings().drift_min_span_s
    u2 = hour.venue.board("u2-a")
    detectable = hour.first_exchange_t["u2-a"] + span / (1 + u2.skew_ppm * 1e-6)
    drifting = _first(hour, "u2-a", "drifting")
    # (1 ms of slack: float64 resolution near 1.8e9 s is a few tenths of a microsecond.)
    assert drifting is not None and detectable - 1e-3 <= drifting <= detectable + LIMIT_S, (
        detectable,
        drifting,
    )
    assert not _left_live_before(hour, "u2-a", detectable - 1e-3)
    delays["u2-a drifting"] = drifting - detectable

    # The faults stay flagged to the end, and nobody else is ever anything but live.
    assert {n: hour.summary[n].state for n in ("u3-a", "g2-a", "u2-a")} == {
        "u3-a": "silent",
        "g2-a": "deaf",
        "u2-a": "drifting",
    }
    for name, s in hour.summary.items():
        if name not in ("u3-a", "g2-a", "u2-a"):
            assert s.state == "live", (name, s)
            assert not _left_live_before(hour, name, float("inf")), name
    print(f"fault detection delays (s): { {k: round(v, 1) for k, v in delays.items()} }")


SHIFT_LIMIT_S = 900.0
"""The knocked antenna must be flagged within 15 simulated minutes: a 5-minute window must tip past the
threshold, then hold it for the 5-minute sustain (collector/models/calibration.py), plus one watch step."""


def test_a_knocked_antenna_is_flagged_with_its_size_and_no_healthy_board_is(hour: HourRun):
    """g3-b hears 6 dB less from minute 20 on; the calibration watch reads raw reference-tag levels."""
    g3b = hour.venue.board("g3-b")
    assert (g3b.gain_step_at_s, g3b.gain_step_db) == (1200.0, -6.0)
    assert [board for _, board, _ in hour.shifts] == ["g3-b"], hour.shifts
    at, _, detail = hour.shifts[0]
    delay = _t(hour, at) - g3b.gain_step_at_s
    assert 0 < delay <= SHIFT_LIMIT_S, delay
    assert detail["shift_db"] == pytest.approx(g3b.gain_step_db, abs=2.0), detail
    assert detail["threshold_db"] == 3.0 and detail["tags"] >= 1
    print(f"calibration shift: g3-b flagged {delay:.0f} s after the step, {detail['shift_db']} dB")


def test_no_unregistered_identity_anywhere_in_the_store(hour: HourRun):
    noise = hour.noise
    # The scan of the recordings found what the scenario puts there: phones with random addresses,
    # iBeacon-format beacons with other UUIDs, other company IDs.
    assert len(noise["addresses"]) > 25 and len(noise["uuids"]) >= 2 and noise["payloads"]
    text = all_text(hour.db)
    low = text.lower()
    # Positive control: the same scan sees registered identities where they belong (tags table).
    venue_uuid = hour.venue.document["venue"]["ibeacon_uuid"]
    assert venue_uuid in low and "lpx:00000001" in low
    found = [a for a in noise["addresses"] if a.lower() in low or a.replace(":", "").lower() in low]
    found += [u for u in noise["uuids"] if u in low or u.replace("-", "") in low]
    found += [p for p in noise["payloads"] if p in low]
    assert found == [], found[:10]


_T_FIELD = re.compile(rb'"t": ([0-9.e+-]+)')


def _dry_run_times(path: Path) -> tuple[np.ndarray, int]:
    """Board seconds of every dry-run line and the line count (a regex: 1.4 million lines of JSON)."""
    data = path.read_bytes()
    ts = np.array([float(x) for x in _T_FIELD.findall(data)], dtype=np.float64)
    return ts, data.count(b"\n")


def test_stored_readings_equal_what_the_boards_heard(hour: HourRun):
    stored = stored_counts(hour.db)
    for b in hour.venue.boards:
        ts, n = _dry_run_times(hour.dry_runs[b.name])
        assert n > 0 and len(ts) == n, (b.name, n, len(ts))
        fault = min(x for x in (b.power_off_at_s, b.radio_hang_at_s, hour.venue.duration_s) if x is not None)
        heard = int(np.count_nonzero(ts <= b.board_time(fault) + 1e-6))
        if b.name == "u3-a":
            continue  # below: a power cut loses what was not yet acknowledged
        assert stored[b.name] == heard == n, (b.name, stored[b.name], heard, n)

    # u3-a: what the collector has is exactly the oldest part of what the board heard (same multiset),
    # and the cut lost at most the unsealed readings (flush 5 s) plus a batch waiting for the 1 s
    # uplink poll and the 0.5 s replay grain.
    u3 = hour.venue.board("u3-a")
    expected = sorted(parse_dry_run(hour.dry_runs["u3-a"].read_text()), key=lambda r: r[1])
    got = stored_readings(hour.db, "u3-a")
    assert got, "u3-a stored nothing"
    last = max(r[1] for r in got)
    prefix = [r for r in expected if r[1] <= last]
    assert Counter(got) == Counter(prefix)
    lost_s = u3.board_time(hour.power_off_at["u3-a"]) - last / 1000.0
    assert 0 <= lost_s <= 10.0, lost_s
    print(f"u3-a: {len(got)} of {len(expected)} readings stored; the cut lost the last {lost_s:.1f} s")


def test_export_strongest_board_is_in_the_true_room(hour: HourRun):
    with np.load(hour.export) as z:
        rssi, tags, boards, starts = z["rssi"], list(z["tags"]), list(z["boards"]), z["bin_starts"]
    assert rssi.shape == (len(tags), hour.venue.duration_s, len(boards))
    room_of = np.array([hour.venue.board(b).room for b in boards])
    mid = starts - hour.venue.start_wall + 0.5
    agree = heard = 0
    for i, tag in enumerate(tags):
        segs = hour.venue.document["tags"].get(tag, {}).get("segments")
        assert segs, f"{tag}: exported but not in truth.json"
        t0 = np.array([s[0] for s in segs])
        rooms = np.array([s[2] for s in segs])
        true_room = rooms[np.clip(np.searchsorted(t0, mid, side="right") - 1, 0, len(segs) - 1)]
        row = rssi[i]
        has = ~np.all(np.isnan(row), axis=1)
        best = np.argmax(np.where(np.isnan(row), -np.inf, row), axis=1)
        heard += int(has.sum())
        agree += int(np.count_nonzero(has & (room_of[best] == true_room)))
    share = agree / heard
    print(f"export: strongest board in the true room for {share:.3f} of {heard} heard tag-seconds")
    # A sanity check of the chain (clock-corrected bins, calibrated RSSI, board names), not a
    # localisation method: measured 0.854 (seed 20261202, 310 384 heard tag-seconds); a broken time
    # base or board mapping drops it towards 1/13 (one room in thirteen).
    assert share >= 0.80
