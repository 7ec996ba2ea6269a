"""Calibration offset from a reference tag, the log-distance helpers, and the walk-test report."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose
from scipy.constants import c as SCIPY_C

from listenpost.collector.models.calibration import (
    SPEED_OF_LIGHT_M_S,
    CalibrationWarning,
    WalkMark,
    WalkRow,
    calibrate_offset,
    distance_from_rssi,
    fspl_db,
    rssi_at_distance,
    walk_report,
)

T0 = 1_800_000_000.0


def test_log_distance_worked_numbers():
    """docs/references.md §7 [RUN]: P1 −59, n 2, 4 m → −71.0412 dBm and back; n 2.7, −75 dBm → 3.9137 m."""
    # Rappaport, Wireless Communications 2nd ed., §4.9 log-distance model (section number from memory).
    assert_allclose(rssi_at_distance(-59.0, 2.0, 4.0), -71.0412, atol=5e-5)
    assert_allclose(distance_from_rssi(-71.0412, -59.0, 2.0), 4.0, atol=1e-4)
    assert_allclose(distance_from_rssi(-75.0, -59.0, 2.7), 3.9137, atol=5e-5)


def test_free_space_loss_matches_reference_figures():
    """FSPL 40.05 dB at 1 m / 2.4 GHz and 60.20 dB at 10 m / 2.44 GHz (docs/references.md §7, scipy.constants.c)."""
    assert SPEED_OF_LIGHT_M_S == SCIPY_C  # scipy.constants.c: the SI-exact value
    assert round(fspl_db(1.0, 2.4e9), 3) == 40.052
    assert round(fspl_db(10.0, 2.44e9), 3) == 60.196
    # Self-consistency: Friis is the n = 2 case of the log-distance model, so 1 m → 10 m costs 20 dB.
    assert_allclose(
        fspl_db(10.0, 2.4e9) - fspl_db(1.0, 2.4e9), -(rssi_at_distance(0.0, 2.0, 10.0)), atol=1e-12
    )
    # ITU-R P.1238 site-general form at 1 m and 2440 MHz (editions -7 to -9, from memory): 20·log10(f) − 28
    # = 39.75 dB, within 0.5 dB of free space (docs/references.md §7).
    assert abs((20 * math.log10(2440) - 28) - fspl_db(1.0, 2.44e9)) < 0.5


@settings(max_examples=100, deadline=None)
@given(p1=st.floats(-90, -30), n=st.floats(1.5, 6.0), d=st.floats(0.1, 100.0))
def test_distance_and_rssi_are_inverse(p1, n, d):
    assert_allclose(distance_from_rssi(rssi_at_distance(p1, n, d), p1, n), d, rtol=1e-9)


def test_offset_from_reference_tag_at_4_m():
    """A board hearing −74 dBm median at 4 m from a −59 dBm tag (n = 2) needs +2.9588 dB."""
    rng = np.random.default_rng(5)
    spread = np.round(rng.normal(0, 1.5, 100))
    samples = np.concatenate([-74.0 + spread, -74.0 - spread, [-74.0]])  # median exactly −74
    r = calibrate_offset(samples, distance_m=4.0, p1_dbm=-59.0, exponent=2.0)
    # Expected: −59 − (−74 + 20·log10 4) = 15 − 12.0412 = 2.9588 (model numbers as in docs/references.md §7).
    assert_allclose(r.offset_db, 2.9588, atol=5e-5)
    assert r.median_dbm == -74.0 and r.samples == 201 and r.warnings == ()
    q75, q25 = np.percentile(samples, [75, 25])
    assert r.spread_db == pytest.approx(q75 - q25)
    # Sign convention: adding the offset makes the board read like the model predicts at 4 m.
    assert_allclose(r.median_dbm + r.offset_db, rssi_at_distance(-59.0, 2.0, 4.0), atol=1e-9)


def test_offset_is_robust_to_a_few_reflections():
    """A handful of −95 dBm dips (someone walked past) barely move a median-based offset."""
    clean = np.full(100, -65.0)
    dipped = clean.copy()
    dipped[:8] = -95.0
    a = calibrate_offset(clean, distance_m=2.0, p1_dbm=-59.0)
    b = calibrate_offset(dipped, distance_m=2.0, p1_dbm=-59.0)
    assert a.offset_db == b.offset_db


def test_warnings_for_few_samples_wide_spread_and_large_offset():
    r = calibrate_offset([-70.0, -60.0, -80.0, -75.0, -62.0], distance_m=1.0, p1_dbm=-59.0)
    assert CalibrationWarning.TOO_FEW_SAMPLES in r.warnings
    assert CalibrationWarning.SPREAD_TOO_WIDE in r.warnings
    far = calibrate_offset(np.full(50, -95.0), distance_m=1.0, p1_dbm=-59.0)
    assert far.warnings == (CalibrationWarning.OFFSET_LARGE,)
    assert far.warnings[0] == "offset_large"


@pytest.mark.parametrize(
    ("kwargs", "field"),
    [
        ({"samples_dbm": []}, "samples_dbm"),
        ({"samples_dbm": [-60.0, float("nan")]}, r"samples_dbm\[1\]"),
        ({"distance_m": 0.0}, "distance_m"),
        ({"exponent": -2.0}, "exponent"),
    ],
)
def test_bad_input_names_the_argument(kwargs, field):
    args = {"samples_dbm": [-60.0] * 40, "distance_m": 2.0, "p1_dbm": -59.0, "exponent": 2.0} | kwargs
    samples = args.pop("samples_dbm")
    with pytest.raises(ValueError, match=field):
        calibrate_offset(samples, **args)


# -- walk test ---------------------------------------------------------------------------------------------

FLOORS = {
    "G0 Foyer": "ground",
    "G1 Light & Optics": "ground",
    "G6 Stair lobby": "ground",
    "U0 Landing": "upper",
}


def walk_rows():
    """A technician in G0 for 60 s, then G6 for 60 s; readings from four boards, one gap in G6."""
    rows = []
    for k in range(60):  # G0, one reading a second per board
        t = T0 + k + 0.2
        rows += [
            ("g0-a", "G0 Foyer", t, -58.0),
            ("g0-b", "G0 Foyer", t, -63.0),
            ("g1-a", "G1 Light & Optics", t, -80.0),
        ]
    for k in range(60):  # G6: 45 seconds heard, 15 missing
        if 20 <= k < 35:
            continue
        t = T0 + 60 + k + 0.5
        rows += [
            ("g6-a", "G6 Stair lobby", t, -61.0),
            ("u0-a", "U0 Landing", t, -64.0),
            ("g0-a", "G0 Foyer", t, -79.0),
        ]
    rows.append(("g1-a", "G1 Light & Optics", T0 + 200.0, -50.0))  # outside every mark: ignored
    return rows


def test_walk_report_per_room():
    """Strongest board, margin, same-floor and cross-floor overlap, and the share of seconds heard."""
    marks = [("G0 Foyer", T0, T0 + 60), WalkMark("G6 Stair lobby", T0 + 60, T0 + 120)]
    g0, g6 = walk_report(marks, walk_rows(), overlap_db=6.0, floors=FLOORS)

    assert g0.strongest.board == "g0-a" and g0.strongest_in_room
    assert g0.margin_db == pytest.approx(5.0)
    assert [h.board for h in g0.heard] == ["g0-a", "g0-b", "g1-a"]
    assert g0.overlap == () and g0.seconds_share == 1.0
    assert g0.heard[0].readings == 60

    assert g6.strongest.board == "g6-a" and g6.margin_db == pytest.approx(3.0)
    assert [h.board for h in g6.overlap] == ["u0-a"]  # within 6 dB, another room
    assert [h.board for h in g6.other_floor] == ["u0-a"]  # ... and another floor
    assert g6.seconds_share == pytest.approx(45 / 60)


def test_walk_report_flags_a_room_won_by_a_neighbour_and_an_unheard_room():
    rows = [WalkRow("g1-a", "G1 Light & Optics", T0 + k, -60.0) for k in range(10)]
    rows += [WalkRow("g0-a", "G0 Foyer", T0 + k, -66.0) for k in range(10)]
    marks = [("G0 Foyer", T0, T0 + 10), ("U5 Workshop", T0 + 100, T0 + 110)]
    g0, u5 = walk_report(marks, rows, floors=FLOORS)
    assert g0.strongest.board == "g1-a" and not g0.strongest_in_room
    assert [h.board for h in g0.overlap] == ["g1-a"]
    assert u5.strongest is None and u5.margin_db is None and u5.seconds_share == 0.0


def test_walk_report_rejects_reversed_mark():
    with pytest.raises(ValueError, match=r"marks\[0\]"):
        walk_report([("G0 Foyer", T0 + 10, T0)], [])


# -- calibration watch -------------------------------------------------------------------------------------

REF_TAGS = [
    "ibeacon:0321413f-8676-4b05-99ca-d259a1f94031:9:1",
    "ibeacon:0321413f-8676-4b05-99ca-d259a1f94031:9:2",
]
WATCHED = {"g0-a": (-70.0, -84.0), "g0-b": (-76.0, -80.0), "g1-a": (-88.0, -91.0)}
"""Board → mean raw level of each reference tag, dBm."""


def _watch_plan(state_dir) -> None:
    from listenpost.collector.models.plan import parse_plan
    from listenpost.collector.web.plan import save_plan

    square = [[0, 0], [20, 0], [20, 20], [0, 20]]
    doc = {
        "format": "listenpost-venue-plan",
        "version": 1,
        "title": "watch",
        "floors": [
            {
                "id": "ground",
                "title": "Ground",
                "level_m": 0,
                "rooms": [{"id": "G0", "name": "G0 Foyer", "polygon": square}],
            }
        ],
        "boards": [
            {"name": b, "floor": "ground", "position": [2 + i, 2], "height_m": 2.5}
            for i, b in enumerate(WATCHED)
        ],
        "reference_tags": [
            {"id": t, "floor": "ground", "position": [10 + i, 10], "height_m": 1.5}
            for i, t in enumerate(REF_TAGS)
        ],
    }
    save_plan(state_dir, parse_plan(doc, "plan"))


async def _watched_venue(
    store,
    tmp_path,
    clock,
    *,
    drop_board=None,
    drop_at=None,
    minutes=60,
    drop_db=6.0,
    restarts=(),
    handovers=(),
):
    """Three boards hearing two reference tags every second (σ 5 dB, whole dBm) for ``minutes``; the monitor
    runs a round every 30 s on the virtual clock, and is replaced by a new one (a restarted collector, its
    memory gone) at each of ``restarts`` (seconds); at each of ``handovers`` the lead passes between two
    collectors that both keep running. Returns the ``calibration_shift`` events with their times."""
    from listenpost.collector.monitor import Monitor
    from listenpost.collector.state import Runtime
    from listenpost.collector.store import Board, Enrollment
    from tests.collector.test_api import settings_for
    from tests.collector.test_store import make_batch

    _watch_plan(tmp_path)
    settings = settings_for(tmp_path)
    t0 = clock.time()
    for b in WATCHED:
        await store.add_board(Board(b, "G0 Foyer", "ground", t0, enrolled_at=t0), Enrollment(b, f"h-{b}", t0))
    await store.add_tags(REF_TAGS, t0)
    monitor = Monitor(store, clock=clock, settings=settings, runtime=Runtime())
    other = Monitor(store, clock=clock, settings=settings, runtime=Runtime())
    rng = np.random.default_rng(11)
    events = []
    step = 30
    for k in range(minutes * 60 // step):
        start = t0 + k * step
        if start - t0 in restarts:
            monitor = Monitor(store, clock=clock, settings=settings, runtime=Runtime())
        if start - t0 in handovers:
            monitor, other = other, monitor
        for b, means in WATCHED.items():
            mean = np.array([means[i % 2] for i in range(step)])
            if b == drop_board and start >= t0 + drop_at:
                mean = mean - drop_db
            rssi = (np.rint(mean + rng.normal(0, 5.0, step)) * 10).astype(np.int32)
            await store.ingest(
                make_batch(b, k, n=step, t0=t0, tags=REF_TAGS, rssi=rssi, offset_db=0.0, boot=f"boot-{b}")
            )
        await clock.advance(step)
        report = await monitor.run_once()
        events += [(clock.time() - t0, e) for e in report.shifts]
    return events


async def test_watch_raises_a_6_db_gain_drop_within_15_minutes(store, tmp_path, clock):
    """g0-b's gain drops 6 dB at minute 20: one calibration_shift event within 15 simulated minutes, sized
    within 2 dB; the other boards raise none."""
    drop_at = 20 * 60.0
    events = await _watched_venue(store, tmp_path, clock, drop_board="g0-b", drop_at=drop_at, minutes=50)
    assert [e.board for _, e in events] == ["g0-b"], events
    at, event = events[0]
    assert event.kind == "calibration_shift"
    assert drop_at < at <= drop_at + 15 * 60, at
    assert abs(event.detail["shift_db"] - (-6.0)) < 2.0, event.detail
    assert event.detail["threshold_db"] == 3.0 and event.detail["tags"] == 2
    stored = [e for e in await store.events() if e.kind == "calibration_shift"]
    assert len(stored) == 1 and stored[0].board == "g0-b"


async def test_watch_goes_on_from_its_stored_levels_across_restarts(store, tmp_path, clock):
    """
    The collector restarts 2 minutes after g0-b's drop (its window already half shifted) and again after the
    event. From stored levels the shift is still raised, once; a watch that learned its level again after
    the first restart would take the shifted level as normal and never raise it.
    """
    drop_at = 20 * 60.0
    events = await _watched_venue(
        store, tmp_path, clock, drop_board="g0-b", drop_at=drop_at, minutes=50, restarts=(22 * 60, 40 * 60)
    )
    assert [e.board for _, e in events] == ["g0-b"], events
    assert drop_at < events[0][0] <= drop_at + 15 * 60
    saved = await store.watch_baselines()
    assert set(saved) == set(WATCHED) and saved["g0-b"].raised and not saved["g0-a"].raised
    assert set(saved["g0-b"].levels) == set(REF_TAGS)


async def test_a_collector_leading_again_goes_on_from_what_the_other_leader_stored(store, tmp_path, clock):
    """The lead passes to another collector a minute after g0-b's drop and comes back after that one raised
    the shift: the first collector, still running all along, takes the stored memory and does not raise
    the same shift again."""
    events = await _watched_venue(
        store, tmp_path, clock, drop_board="g0-b", drop_at=20 * 60.0, minutes=50, handovers=(21 * 60, 40 * 60)
    )
    assert [(e.board, 21 * 60 < at <= 40 * 60) for at, e in events] == [("g0-b", True)], events


async def test_watch_is_quiet_for_healthy_boards_over_an_hour(store, tmp_path, clock):
    assert await _watched_venue(store, tmp_path, clock, minutes=60) == []


async def test_shift_shows_on_status_and_fleet_calibration_takes_it_in(
    store, tmp_path, clock, aiohttp_client
):
    """The shifted board carries the figure and an attention issue in /v1/status; a fleet calibration
    applied over the admin API stores new offsets and the issue goes."""
    from tests.collector.test_api import admin_headers, make_client

    await _watched_venue(store, tmp_path, clock, drop_board="g0-b", drop_at=600.0, minutes=25)
    client = await make_client(aiohttp_client, tmp_path, clock, store=store)
    rows = {r["name"]: r for r in (await (await client.get("/v1/status")).json())["boards"]}
    assert rows["g0-b"]["calibration_shift_db"] == pytest.approx(-6.0, abs=2.0)
    assert [i["what"] for i in rows["g0-b"]["attention"]] == ["Signal level shifted since calibration"]
    assert rows["g0-a"]["calibration_shift_db"] is None and rows["g0-a"]["attention"] == []

    # Three boards, two tags: the pairs cannot fix the losses too, so they are held (and said so); not applied.
    r = await client.post("/v1/admin/calibrate/fleet", json={"minutes": 5}, headers=admin_headers(tmp_path))
    answer = await r.json()
    assert r.status == 200 and answer["losses_held"] is True and answer["applied"] == []
    assert (answer["wall_db"], answer["floor_db"]) == (5.0, 15.0)
    r = await client.post("/v1/admin/calibrate/fleet", json={"minutes": 0.5}, headers=admin_headers(tmp_path))
    assert r.status == 400 and (await r.json())["error"]["field"] == "minutes"
    r = await client.post("/v1/admin/calibrate/fleet", json={"minutes": "5"}, headers=admin_headers(tmp_path))
    assert r.status == 400 and (await r.json())["error"]["field"] == "minutes"
    body = {"minutes": 5, "apply": True, "wall_db": 0, "floor_db": 0}
    r = await client.post("/v1/admin/calibrate/fleet", json=body, headers=admin_headers(tmp_path))
    assert r.status == 200, await r.text()
    fit = await r.json()
    assert sorted(fit["applied"]) == sorted(WATCHED) and fit["unheard"] == []
    offsets = {b.name: b.offset_db for b in await store.list_boards()}
    assert offsets == {b["board"]: pytest.approx(b["offset_db"], abs=1e-3) for b in fit["boards"]}
    rows = {r["name"]: r for r in (await (await client.get("/v1/status")).json())["boards"]}
    assert rows["g0-b"]["calibration_shift_db"] is None and rows["g0-b"]["attention"] == []
