"""The venue simulator: scenario validation, geometry, radio model, faults, outputs and the committed logs."""

from __future__ import annotations

import copy
import datetime as dt
import gzip
import json
import math
import time
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
import yaml
from hypothesis import given, settings
from hypothesis import strategies as st

from listenpost.agent.pipeline.decode import Decoder
from listenpost.agent.pipeline.filter import TagFilter
from listenpost.agent.sources.replay import read_recording
from listenpost.cli import main as listenpost_main
from listenpost.core.errors import ConfigError
from listenpost.core.identity import load_tag_file
from listenpost.core.settings import Section as ConfigSection
from listenpost.core.settings import parse_rule
from listenpost.sim.generate import generate, simulate
from listenpost.sim.radio import mean_rssi_dbm
from listenpost.sim.scenario import builtin_path, load_scenario, parse_scenario
from listenpost.sim.truth import read_truth
from listenpost.sim.venue import Venue

REPO = Path(__file__).resolve().parents[1]
REPLAY_LOGS = REPO / "replay_logs"
BOARDS = ("g0-a g0-b g1-a g2-a g3-a g3-b g4-a g5-a g6-a u0-a u1-a u2-a u3-a u4-a u4-b u5-a").split()


@pytest.fixture(scope="module")
def brackenford():
    return load_scenario("brackenford")


@pytest.fixture(scope="module")
def venue_run(tmp_path_factory, brackenford):
    """Seven minutes of the full venue (past both fault times), written once for the module."""
    out = tmp_path_factory.mktemp("venue")
    result = generate(brackenford, 7, out, seed=11)
    return out, result, json.loads((out / "truth.json").read_text())


def _quiet(scenario, **radio):
    """Only the four fixed reference tags advertise: no visitors, no phones, no fixed noise."""
    return replace(
        scenario,
        visitors=replace(scenario.visitors, arrivals_per_minute=0.0),
        noise=replace(scenario.noise, phone_fraction=0.0, fixed=()),
        radio=replace(scenario.radio, **radio),
    )


def _raw():
    return yaml.safe_load(builtin_path("brackenford").read_text())


# ---------------------------------------------------------------- scenario file


def test_shipped_scenario_matches_the_venue_description(brackenford):
    """The shipped file has docs/demo-venue.md's rooms, 16 boards, faults and tag population."""
    assert [r.name for r in brackenford.rooms] == [f"G{i}" for i in range(7)] + [f"U{i}" for i in range(6)]
    assert [b.name for b in brackenford.boards] == BOARDS
    by = {b.name: b for b in brackenford.boards}
    assert by["u2-a"].skew_ppm == 85
    assert by["g4-a"].wall_error_s == -(3 * 3600 + 12 * 60)
    assert by["u3-a"].power_off_at_s == 360
    assert by["g2-a"].radio_hang_at_s == 240
    t = brackenford.tags
    assert (t.ibeacon_major, t.ibeacon_minors, t.measured_power_dbm, t.interval_s) == (7, (1, 80), -59, 0.5)
    assert t.eddystone_instances == (1, 30) and len(t.eddystone_namespace) == 10 and t.tlm_every == 10
    assert (
        t.custom_numbers == (1, 10) and t.custom_rule.company_id == 0xFFFF and t.custom_rule.prefix == b"LP"
    )
    assert t.reference_major == 9 and [r.place.room for r in t.reference] == ["G0", "G3", "U0", "U4"]
    r = brackenford.radio
    assert (
        r.exponent,
        r.wall_db,
        r.floor_db,
        r.shadowing_sigma_db,
        r.sensitivity_dbm,
        r.hear_probability,
    ) == (3.0, 5.0, 15.0, 5.0, -100.0, 0.9)
    assert "demo choice" in builtin_path("brackenford").read_text()


@pytest.mark.parametrize(
    ("edit", "where"),
    [
        (lambda d: d["boards"][3].__setitem__("room", "G9"), "boards[3].room: unknown room"),
        (lambda d: d["boards"][0].__setitem__("at", [0, 0, 2.5]), "boards[0].at: must lie inside room G0"),
        (
            lambda d: d["rooms"][1].__setitem__("doors", ["G2"]),
            "rooms[0].doors: door to 'G1' must be listed on both sides",
        ),
        (lambda d: d["rooms"][2].__setitem__("x", [10, 20]), "overlaps"),
        (
            lambda d: d["radio"].__setitem__("hear_probability", 1.5),
            "radio.hear_probability: must be within 0..1",
        ),
        (lambda d: d["radio"].__setitem__("shadowing_sigma", 5), "radio.shadowing_sigma: unknown key"),
        (
            lambda d: d["tags"]["ibeacon"].__setitem__("uuid", "not-a-uuid"),
            "tags.ibeacon.uuid: must be a UUID",
        ),
        (
            lambda d: d["tags"]["eddystone"].__setitem__("namespace", "abcd"),
            "tags.eddystone.namespace: must be 10 bytes",
        ),
        (lambda d: d["noise"]["fixed"][2].__setitem__("company_id", 0xFFFF), "noise.fixed[2].company_id"),
        (lambda d: d.pop("seed"), "seed: is required"),
    ],
)
def test_bad_scenario_names_the_key_path(brackenford, edit, where):
    """A bad value is rejected with the file name and the key path."""
    data = copy.deepcopy(_raw())
    edit(data)
    with pytest.raises(ConfigError) as e:
        parse_scenario(data, origin="venue.yaml")
    assert str(e.value).startswith("venue.yaml: ") and where in str(e.value)


def test_missing_scenario_file_is_a_config_error(tmp_path):
    with pytest.raises(ConfigError, match="no such scenario"):
        load_scenario(tmp_path / "nope.yaml")
    bad = tmp_path / "bad.yaml"
    bad.write_text("name: x\nrooms: [\n")
    with pytest.raises(ConfigError, match=r"bad.yaml: line \d+"):
        load_scenario(bad)


# ---------------------------------------------------------------- geometry and radio


def test_walls_and_floors_for_known_positions(brackenford):
    """Counts worked out by hand on the plan in brackenford.yaml."""
    v = Venue(brackenford)
    up = brackenford.floor_height_m
    cases = [
        # same room (G0 → G0)
        ((20, 5, 1.2), (30, 10, 2.5), 0, 0),
        # G0 → G1 through their shared wall x = 16
        ((20, 5, 1.2), (8, 9, 2.5), 1, 0),
        # G0 → G1 → G2: walls x = 16 then y = 18
        ((20, 5, 1.2), (8, 28, 2.5), 2, 0),
        # G0 → service core (no room) → G3: out of G0 at y = 16, into G3 at y = 22
        ((20, 5, 1.2), (22, 30, 2.5), 2, 0),
        # G0 → U0: slab passed above G0 at (27.97, 14.1), which upstairs is U2; then U2|U3 (x = 28), U3|U0 (y = 16)
        ((20, 5, 1.2), (34, 21, up + 2.5), 2, 1),
        # straight up from G0 into U2 (U2 spans x 12..28 upstairs)
        ((20, 5, 1.2), (20, 10, up + 2.5), 0, 1),
        # G0 → G4 at x = 36 downstairs, slab at x ≈ 37.1, then U3 → U4 at x = 44 upstairs
        ((20, 5, 1.2), (50, 5, up + 2.5), 2, 1),
    ]
    a = np.array([c[0] for c in cases], dtype=float)
    b = np.array([c[1] for c in cases], dtype=float)
    assert v.walls_crossed(a, b).tolist() == [c[2] for c in cases]
    assert v.walls_crossed(b, a).tolist() == [c[2] for c in cases]  # direction does not matter
    assert v.floors_crossed(a[:, 2], b[:, 2]).tolist() == [c[3] for c in cases]
    assert [v.names[i] for i in v.room_at(a[:, 0], a[:, 1], a[:, 2])] == ["G0"] * len(cases)
    assert v.shortest_path(v.index["G0"], v.index["U5"]) == [
        v.index[r] for r in ("G0", "G6", "U0", "U3", "U4", "U5")
    ]


def _walls_by_sampling(v: Venue, a, b, steps: int = 4000) -> int:
    """Brute force: walk the line in small steps and count changes of room (or of "no room")."""
    s = np.linspace(0.0, 1.0, steps)
    p = np.asarray(a, float)[None, :] + s[:, None] * (np.asarray(b, float) - np.asarray(a, float))[None, :]
    rooms = v.room_at(p[:, 0], p[:, 1], p[:, 2])
    return int(np.count_nonzero(np.diff(rooms)))


@settings(max_examples=60, deadline=None)
@given(st.data())
def test_walls_crossed_agrees_with_brute_force_sampling(data):
    """The exact clipping count equals a step-by-step walk of the same line, for random points in random rooms."""
    sc = load_scenario("brackenford")
    v = Venue(sc)

    def point(room: int):
        x = data.draw(st.floats(v.x0[room] + 0.3, v.x1[room] - 0.3))
        y = data.draw(st.floats(v.y0[room] + 0.3, v.y1[room] - 0.3))
        z = data.draw(st.floats(0.5, 3.5)) + v.floor[room] * v.floor_height
        return (x, y, z)

    ra = data.draw(st.integers(0, len(v.names) - 1))
    rb = data.draw(st.integers(0, len(v.names) - 1))
    a, b = point(ra), point(rb)
    slab_seen = 0
    if v.floor[ra] != v.floor[rb]:
        # The walk also sees the slab as a change of room, unless there is no room on either side of it.
        z = v.floor_height * max(v.floor[ra], v.floor[rb])
        f = (z - a[2]) / (b[2] - a[2])
        x, y = a[0] + f * (b[0] - a[0]), a[1] + f * (b[1] - a[1])
        below, above = v.room_at(x, y, z - 1e-6), v.room_at(x, y, z + 1e-6)
        slab_seen = int(below != above)
    exact = int(v.walls_crossed(np.array(a), np.array(b)))
    sampled = _walls_by_sampling(v, a, b) - slab_seen
    # The walk can step over a room corner clipped by less than one step (≈ 1-2 cm): two walls unseen.
    assert exact in (sampled, sampled + 2), (a, b, exact, sampled)


@pytest.mark.parametrize("d", [1.0, 2.0, 4.0, 10.0, 25.0])
def test_mean_rssi_is_the_log_distance_model(brackenford, d):
    """
    Log-distance path loss, Rappaport, Wireless Communications 2nd ed. §4.9 (formula from memory, also in
    docs/references.md §7): RSSI(d) = P1 − 10·n·log10(d/d0), d0 = 1 m; here n = 3.0, so −30·log10(d).
    """
    r = brackenford.radio
    got = float(mean_rssi_dbm(-59, np.array(d), np.array(0), np.array(0), r))
    assert got == pytest.approx(-59 - 30 * math.log10(d), abs=1e-9)
    with_walls = float(mean_rssi_dbm(-59, np.array(d), np.array(2), np.array(1), r))
    assert with_walls == pytest.approx(-59 - 30 * math.log10(d) - 2 * 5 - 15, abs=1e-9)
    # Common practice: each doubling of distance with n = 3 costs 10·3·log10(2) ≈ 9.03 dB.
    assert float(mean_rssi_dbm(-59, np.array(2 * d), np.array(0), np.array(0), r)) - got == pytest.approx(
        -9.0309, abs=1e-4
    )


def test_reports_follow_the_formula_with_shadowing_off(brackenford):
    """With σ = 0 and every advert heard, each report is round(P1 − 30·log10 d − 5·walls − 15·floors + offset)."""
    sc = _quiet(brackenford, shadowing_sigma_db=0.0, hear_probability=1.0, sensitivity_dbm=-200.0)
    sim = simulate(sc, 1.0, seed=4)
    names = [b.name for b in sim.boards]
    ref_g0 = next(i for i, d in enumerate(sim.devices) if d.tag_id and d.tag_id.endswith(":9:1"))
    up = brackenford.floor_height_m
    # reference tag 1 at G0 (30, 8, 1.5); walls/floors worked out by hand (see test above for the method)
    cases = {"g0-b": ((34, 15, 2.5), 0, 0), "g1-a": ((8, 9, 2.5), 1, 0), "u0-a": ((34, 21, up + 2.5), 1, 1)}
    for board, (pos, walls, floors) in cases.items():
        bi = names.index(board)
        h = sim.heard[bi]
        mine = h.rssi[h.device == ref_g0].astype(float)
        assert len(mine) > 100
        d = math.dist((30, 8, 1.5), pos)
        expected = -59 - 30 * math.log10(d) - 5 * walls - 15 * floors + sim.boards[bi].offset_db
        assert np.all(np.abs(mine - expected) <= 0.5 + 1e-3), (board, expected, set(mine.tolist()))


def test_shadowing_sigma_and_hearing_probability(brackenford):
    """
    Residuals around the mean are N(0, 5²) (plus rounding, variance 1/12 dB²) and 90 % of adverts are heard.

    Tolerances: n ≈ 5 000 residuals, so the sample σ has a standard error ≈ 5/√(2n) ≈ 0.05 dB (we allow 0.15);
    the heard fraction is checked with scipy's exact binomial test (reference library) at p > 0.001.
    """
    from scipy import stats

    sc = _quiet(brackenford, sensitivity_dbm=-300.0)
    sim = simulate(sc, 2.0, seed=7)
    v = Venue(sc)
    bpos = np.array([b.pos for b in sim.boards])
    residuals, heard, offered = [], 0, 0
    for bi, h in enumerate(sim.heard):
        for di, dev in enumerate(sim.devices):
            if dev.kind.value != "reference":
                continue
            p = dev.track.pos[0]
            mean = float(
                mean_rssi_dbm(
                    dev.p1_dbm,
                    np.linalg.norm(p - bpos[bi]),
                    v.walls_crossed(p, bpos[bi]),
                    v.floors_crossed(p[2], bpos[bi][2]),
                    sc.radio,
                )
            )
            r = h.rssi[h.device == di].astype(float)
            heard += len(r)
            # Reports are int8 and clip at -127 dBm: keep pairs whose mean is > 4σ above that.
            if mean + sim.boards[bi].offset_db > -105:
                residuals.append(r - mean - sim.boards[bi].offset_db)
    offered = sim.adverts_sent * len(sim.boards)
    res = np.concatenate(residuals)
    assert abs(res.mean()) < 0.1
    assert res.std() == pytest.approx(math.sqrt(5.0**2 + 1 / 12), abs=0.15)
    # scipy.stats.normaltest (D'Agostino–Pearson) would flag the rounding; skew and kurtosis suffice here.
    assert abs(stats.skew(res)) < 0.1 and abs(stats.kurtosis(res)) < 0.15
    assert heard / offered == pytest.approx(0.9, abs=0.01)
    assert stats.binomtest(heard, offered, 0.9).pvalue > 1e-3


def test_a_gain_step_lowers_only_that_boards_reports_from_its_minute_on(brackenford):
    """
    g3-b's antenna is knocked at minute 20 (−6 dB). Against the same run without the step, every report of
    g3-b heard in both runs (and clear of the int8 floor) is exactly 6 dB lower from then on and unchanged before; other boards' reports
    are identical. The step only adds to the offset, so the random draws are the same in both runs.
    """
    sc = _quiet(brackenford, sensitivity_dbm=-300.0)
    at = {b.name: b for b in sc.boards}["g3-b"]
    assert (at.gain_step_at_s, at.gain_step_db) == (1200.0, -6.0)
    step = replace(
        sc, boards=tuple(replace(b, gain_step_at_s=60.0) if b.name == "g3-b" else b for b in sc.boards)
    )
    flat = replace(
        sc,
        boards=tuple(
            replace(b, gain_step_at_s=None, gain_step_db=0.0) if b.name == "g3-b" else b for b in sc.boards
        ),
    )
    a, b = simulate(step, 2.0, seed=3), simulate(flat, 2.0, seed=3)
    for i, board in enumerate(a.boards):
        ha, hb = a.heard[i], b.heard[i]
        assert np.array_equal(ha.t_true, hb.t_true) and np.array_equal(ha.device, hb.device)
        diff = ha.rssi.astype(int) - hb.rssi.astype(int)
        if board.name != "g3-b":
            assert not diff.any(), board.name
            continue
        # Reports clip at −127 dBm (int8): compare the ones that stay clear of it.
        after = (ha.t_true >= 60.0) & (hb.rssi > -120)
        assert after.sum() > 100 and (ha.t_true < 60.0).sum() > 100
        assert not diff[ha.t_true < 60.0].any()
        assert np.all(diff[after] == -6)


def test_a_gain_step_needs_both_its_minute_and_its_size():
    data = yaml.safe_load(builtin_path("brackenford").read_text())
    data["boards"][0]["gain_step_db"] = -6
    with pytest.raises(ConfigError, match=r"boards\[0\]\.gain_step_db: gain_step_at_s and a non-zero"):
        parse_scenario(data)


# ---------------------------------------------------------------- outputs of a full run


def test_reproducible_by_seed(tmp_path, brackenford):
    """Same seed → byte-identical files; another seed → different recordings."""
    a, b, c = tmp_path / "a", tmp_path / "b", tmp_path / "c"
    generate(brackenford, 1, a, seed=5)
    generate(brackenford, 1, b, seed=5)
    generate(brackenford, 1, c, seed=6, btsnoop_board=None)
    names = sorted(p.name for p in a.iterdir())
    assert names == sorted(p.name for p in b.iterdir())
    assert not [p for p in a.iterdir() if p.name.startswith(".")]  # no temporary files left behind
    assert len(names) == 16 + 3
    for n in names:
        assert (a / n).read_bytes() == (b / n).read_bytes(), n
    assert (a / "g0-a.jsonl.gz").read_bytes() != (c / "g0-a.jsonl.gz").read_bytes()
    assert (a / "g0-a.jsonl.gz").read_bytes()[4:8] == b"\0\0\0\0"  # gzip MTIME field (RFC 1952 §2.3)


def _true_times(path: Path, board: dict) -> np.ndarray:
    _, adverts = read_recording(path)
    t = np.array([a.t_mono_ns / 1e9 for a in adverts])
    return t / (1 + board["skew_ppm"] * 1e-6) - board["uptime_at_start_s"]


def test_faults_as_specified(venue_run):
    """g2-a's radio hangs at minute 4, u3-a dies at minute 6, the others hear to the end; g4-a's wall clock lags."""
    out, _, truth = venue_run
    boards = truth["boards"]
    ends = {}
    for name in BOARDS:
        t = _true_times(out / f"{name}.jsonl.gz", boards[name])
        assert len(t) == boards[name]["adverts"] > 0
        assert np.all(np.diff(t) >= -1e-3)
        ends[name] = t[-1]
    assert 235 < ends["g2-a"] < 240
    assert 355 < ends["u3-a"] < 360
    assert all(ends[n] > 400 for n in BOARDS if n not in ("g2-a", "u3-a"))
    assert truth["faults"]["g2-a"] == {"radio_hang_at_s": 240}
    assert truth["faults"]["u3-a"] == {"power_off_at_s": 360}
    assert truth["faults"]["g4-a"] == {"wall_error_s": -11520}
    assert truth["faults"]["u2-a"] == {"skew_ppm": 85}
    assert truth["faults"]["g3-b"] == {"gain_step_at_s": 1200, "gain_step_db": -6}
    hdr, _ = read_recording(out / "g4-a.jsonl.gz")
    assert hdr.wall_at_start == pytest.approx(truth["start_wall"] - 11520, abs=1e-3)
    hdr, _ = read_recording(out / "g0-a.jsonl.gz")
    assert abs(hdr.wall_at_start - truth["start_wall"]) <= 0.02
    for name in BOARDS:
        b = boards[name]
        assert name == "u2-a" or abs(b["skew_ppm"]) <= 30
        assert abs(b["true_offset_db"]) <= 4


def test_truth_reader_and_writer_share_one_schema(venue_run, tmp_path):
    """Every board entry the simulator wrote reads back into `BoardTruth` and writes out unchanged."""
    out, _, doc = venue_run
    truth = read_truth(out)
    assert [b.name for b in truth.boards] == sorted(doc["boards"])
    for b in truth.boards:
        assert b.entry() == doc["boards"][b.name]
        assert b.recording == out / b.file and b.recording.exists()
        assert b.floor in doc["venue"]["floors"] and b.room_label.startswith(b.room + " ")
    assert truth.document == doc and truth.start_wall == doc["start_wall"]
    (tmp_path / "tags.txt").write_text("")
    (tmp_path / "g0-a.jsonl.gz").symlink_to(out / "g0-a.jsonl.gz")
    bad = {**doc, "version": doc["version"] + 1}
    (tmp_path / "truth.json").write_text(json.dumps(bad))
    with pytest.raises(ConfigError, match="format/version"):
        read_truth(tmp_path)
    broken = {**doc, "boards": {"g0-a": {k: v for k, v in doc["boards"]["g0-a"].items() if k != "boot"}}}
    (tmp_path / "truth.json").write_text(json.dumps(broken))
    with pytest.raises(ConfigError, match=r"boards\.g0-a\.boot: is required"):
        read_truth(tmp_path)


def test_recordings_decode_to_registered_tags_and_noise(venue_run):
    """Every recording reads with the agent's reader; tags decode with the agent's decoder, noise does not."""
    out, _, truth = venue_run
    registered = load_tag_file(out / "tags.txt")
    assert len(registered) == 80 + 30 + 10 + 4
    assert registered == set(truth["tags"])
    rules = [parse_rule(ConfigSection(r, "rules[0]", "truth.json")) for r in truth["decode_rules"]]
    seen: set[str] = set()
    dropped = telemetry = 0
    batteries, temps = [], []
    for name in BOARDS:
        hdr, adverts = read_recording(out / f"{name}.jsonl.gz")
        assert (hdr.board, hdr.boot) == (name, truth["boards"][name]["boot"])
        decode = Decoder(rules, registry=TagFilter(registered))
        for a in adverts:
            r = decode(a)
            if r is None:
                dropped += 1
                continue
            assert r.tag in registered
            seen.add(r.tag)
            if r.telemetry is not None:
                telemetry += 1
                batteries.append(r.telemetry.battery_mv)
                temps.append(r.telemetry.temperature_c)
    kinds = {truth["tags"][t]["kind"] for t in seen}
    assert kinds == {"ibeacon", "eddystone", "custom", "reference"}
    assert any(t.startswith("lpx:0000000") for t in seen)
    assert dropped > 1000  # phones, foreign beacons and other companies were in the air
    assert telemetry > 100 and 2700 < min(batteries) <= max(batteries) <= 3100
    assert 17 < min(temps) <= max(temps) < 26


def test_tags_in_the_handout_box_are_silent(venue_run):
    """Tags waiting in the hand-out box are switched off (the scenario's choice); in the return box they advertise."""
    out, _, truth = venue_run
    by_address = {v["address"]: v["segments"] for v in truth["tags"].values()}
    waits = sum(1 for segs in by_address.values() for s in segs if s[3] == "handout_box" and s[1] - s[0] > 30)
    assert waits > 5
    in_box = {"handout_box": 0, "return_box": 0}
    for name in BOARDS:
        b = truth["boards"][name]
        _, adverts = read_recording(out / f"{name}.jsonl.gz")
        for a in adverts:
            segs = by_address.get(a.address)
            if segs is None:
                continue
            tt = a.t_mono_ns / 1e9 / (1 + b["skew_ppm"] * 1e-6) - b["uptime_at_start_s"]
            for s0, s1, _, holder in segs:
                if s0 + 0.1 < tt < s1 - 0.1 and holder in in_box:
                    in_box[holder] += 1
    assert in_box["handout_box"] == 0
    assert in_box["return_box"] > 100


def test_truth_segments_walk_the_door_graph(venue_run, brackenford):
    """Each tag's run-length segments tile the recording, and carried tags only move through doors."""
    _, _, truth = venue_run
    doors = {r.name: set(r.doors) for r in brackenford.rooms}
    moved = 0
    for tag, v in truth["tags"].items():
        segs = v["segments"]
        assert segs[0][0] == 0.0 and segs[-1][1] == truth["duration_s"], tag
        for (_, a1, ra, ha), (b0, _, rb, hb) in zip(segs, segs[1:], strict=False):
            assert abs(a1 - b0) <= 0.11
            if ha == hb == "visitor" and ra != rb:
                assert rb in doors[ra], (tag, ra, rb)
                moved += 1
            if hb == "return_box":
                assert ra == rb == "G0"
    assert moved > 100


def test_btsnoop_capture_reads_with_an_independent_parser(venue_run):
    """
    g0-a's capture, read by PyPI btsnoop-parser 0.10.0 (not our code), holds the same adverts at the
    board's wall-clock times; payload fields are read by hand per Core Spec Vol 4 Part E §7.7.65.2
    (docs/references.md §2).
    """
    import btsnoop_parser

    out, _, truth = venue_run
    b = truth["boards"]["g0-a"]
    data = gzip.decompress((out / "g0-a.btsnoop.gz").read_bytes())
    assert data[:8] == b"btsnoop\0" and int.from_bytes(data[12:16], "big") == 2001
    # btsnoop-parser counts from year 1, not 0; a reference_time just after the capture makes it correct
    # itself (docs/references.md §3).
    ref = dt.datetime.fromtimestamp(truth["start_wall"] + 86400, dt.UTC)
    recs = [r for r in btsnoop_parser.iter_records(data, reference_time=ref) if r["packet_type"] == 4]
    _, adverts = read_recording(out / "g0-a.jsonl.gz")
    adverts = list(adverts)
    assert len(recs) == len(adverts) == b["adverts"]
    wall0 = truth["start_wall"] + b["wall_error_s"]
    for r, a in list(zip(recs, adverts, strict=True))[::97]:
        p = r["payload"]
        assert p[0] == 0x3E and p[2] == 0x02 and p[3] == 1  # LE Meta, Advertising Report, 1 report
        assert p[6:12][::-1].hex(":").upper() == a.address  # address is little-endian on the wire
        assert int.from_bytes(p[-1:], "big", signed=True) == a.rssi_dbm
        t_true = a.t_mono_ns / 1e9 / (1 + b["skew_ppm"] * 1e-6) - b["uptime_at_start_s"]
        assert r["timestamp"].timestamp() == pytest.approx(wall0 + t_true, abs=2e-3)


def test_u2a_clock_runs_85_ppm_fast(tmp_path, brackenford):
    """Fit board time against capture (true) time for u2-a: the slope is 1 + 85e-6 within 1 ppm."""
    from listenpost.agent.sources.btsnoop import read_btsnoop

    generate(brackenford, 2, tmp_path, seed=3, btsnoop_board="u2-a")
    truth = json.loads((tmp_path / "truth.json").read_text())
    _, adverts = read_recording(tmp_path / "u2-a.jsonl.gz")
    t_board = np.array([a.t_mono_ns / 1e9 for a in adverts])
    # Capture times are the board's wall clock, which runs at true rate (NTP-disciplined).
    t_cap = np.array([c.t_unix_us / 1e6 for c in read_btsnoop(tmp_path / "u2-a.btsnoop.gz")])
    assert len(t_board) == len(t_cap) > 1000
    slope = np.polyfit(t_cap, t_board, 1)[0]
    assert (slope - 1) * 1e6 == pytest.approx(85.0, abs=1.0)
    assert truth["boards"]["u2-a"]["skew_ppm"] == 85


def test_an_hour_of_the_full_venue_is_fast(brackenford, venue_run):
    """The arrays for one hour take seconds; writing is measured on the 7-minute run and scaled."""
    t0 = time.perf_counter()
    sim = simulate(brackenford, 60.0, seed=1)
    took = time.perf_counter() - t0
    lines = sum(len(h.t_true) for h in sim.heard)
    _, result, _ = venue_run
    per_line = result.seconds["recordings"] / sum(result.lines.values())
    print(
        f"\nsimulate 60 min: {took:.2f} s, {lines} lines; writing ≈ {per_line * 1e6:.1f} µs/line "
        f"→ ≈ {took + per_line * lines:.1f} s for the hour"
    )
    assert lines > 500_000
    assert took < 30
    assert took + per_line * lines < 120  # loose: machines are noisy; the report gives measured figures


def test_cli_runs_and_rejects_bad_input(tmp_path, capsys):
    assert (
        listenpost_main(
            ["sim", "brackenford", "--minutes", "0.5", "--out", str(tmp_path / "o"), "--seed", "2"]
        )
        == 0
    )
    assert (tmp_path / "o" / "u5-a.jsonl.gz").exists() and (tmp_path / "o" / "g0-a.btsnoop.gz").exists()
    assert listenpost_main(["sim", "brackenford", "--minutes", "0", "--out", str(tmp_path / "p")]) == 2
    assert "--minutes" in capsys.readouterr().err
    assert (
        listenpost_main(
            ["sim", str(tmp_path / "missing.yaml"), "--minutes", "1", "--out", str(tmp_path / "p")]
        )
        == 2
    )
    assert not (tmp_path / "p").exists()


# ---------------------------------------------------------------- the committed recording


def test_committed_replay_logs_are_complete_and_small():
    files = {p.name: p for p in REPLAY_LOGS.iterdir()}
    for name in BOARDS:
        assert f"{name}.jsonl.gz" in files
    for name in ("g0-a.btsnoop.gz", "truth.json", "tags.txt", "README.md"):
        assert name in files
    total = sum(p.stat().st_size for p in files.values())
    assert total <= 5 * 1024 * 1024, total
    truth = json.loads(files["truth.json"].read_text())
    assert truth["duration_s"] == 600 and truth["scenario"] == "brackenford"
    assert f"--seed {truth['seed']}" in files["README.md"].read_text()


def test_committed_replay_logs_are_what_the_command_makes(tmp_path):
    """Regenerating with the README's command gives the committed bytes (else: regenerate and commit)."""
    truth = json.loads((REPLAY_LOGS / "truth.json").read_text())
    assert (
        listenpost_main(
            ["sim", "brackenford", "--minutes", "10", "--out", str(tmp_path), "--seed", str(truth["seed"])]
        )
        == 0
    )
    for p in (q for q in REPLAY_LOGS.iterdir() if q.name != "__init__.py"):
        if p.name != "README.md":
            assert (tmp_path / p.name).read_bytes() == p.read_bytes(), p.name
