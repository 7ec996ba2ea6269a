"""Fleet calibration: one solve over every board and reference tag, checked against the simulator's truth
and against scipy.optimize.least_squares."""

from __future__ import annotations

import gzip
import json
from pathlib import Path

import numpy as np
import pytest
from scipy.optimize import least_squares

from listenpost.collector.models.calibration_fleet import (
    FALLBACK_LOSSES_DB,
    HUBER_K,
    design,
    pair_geometry,
    pair_medians,
    plan_geometry,
    solve_fleet,
)
from listenpost.collector.models.plan import parse_plan
from listenpost.demo.collector import venue_plan
from listenpost.sim.truth import read_truth
from tests.collector import test_admin_cli

server = test_admin_cli.server  # the fixture: a real collector on loopback
RECORDING = Path(__file__).resolve().parents[2] / "replay_logs"


@pytest.fixture(scope="module")
def reports():
    """The simulator's recorded reports of the reference tags: truth, plan, and (boards, tags, raw RSSI)."""
    truth = read_truth(RECORDING)
    plan = parse_plan(venue_plan(truth), "plan")
    venue = truth.document["venue"]
    uuid, major = venue["ibeacon_uuid"], venue["reference_major"]
    prefix = "0215" + uuid.replace("-", "") + f"{major:04x}"
    boards, tags, raw = [], [], []
    for path in sorted(RECORDING.glob("*.jsonl.gz")):
        board = path.name.split(".")[0]
        with gzip.open(path, "rt") as f:
            for line in f:
                m = json.loads(line).get("m", {}).get("004c", "")
                if m.startswith(prefix):
                    boards.append(board)
                    tags.append(f"ibeacon:{uuid}:{major}:{int(m[len(prefix) : len(prefix) + 4], 16)}")
                    raw.append(json.loads(line)["r"])
    return truth, plan, (np.array(boards, dtype=object), tags, np.array(raw, dtype=float))


@pytest.fixture(scope="module")
def recording(reports):
    """Truth, plan and the per-pair levels, corrected for the reports cut at each board's sensitivity."""
    truth, plan, (b, tags, r) = reports
    # The weakest report each board delivered marks its sensitivity (whole dBm: the cut is half a dB lower).
    floors = {name: float(r[b == name].min()) - 0.5 for name in set(b.tolist())}
    return truth, plan, pair_medians(b, tags, r, floor_dbm=floors)


def test_geometry_from_the_plan_counts_walls_and_slabs(recording):
    """g0-a to the G0 reference tag: same room, 13.5 m; g0-b to the U0 tag: one slab, one wall."""
    _, plan, _ = recording
    g = plan_geometry(plan)
    g0a = g[("g0-a", "ibeacon:0321413f-8676-4b05-99ca-d259a1f94031:9:1")]
    assert (g0a.walls, g0a.floors) == (0, 0) and g0a.distance_m == pytest.approx(
        np.sqrt(11.5**2 + 7**2 + 1.0**2)
    )
    assert g0a.p1_dbm == -59.0
    u0 = g[("g0-b", "ibeacon:0321413f-8676-4b05-99ca-d259a1f94031:9:3")]
    assert u0.floors == 1 and u0.walls == 1
    board = next(b for b in plan.boards if b.id == "u0-a")
    same = pair_geometry(plan, board, board, -59.0)
    assert same.distance_m == 0.0 and same.walls == 0


def test_recovers_the_simulated_offsets_and_exponent(recording):
    """Against replay_logs/truth.json, everything fitted (offsets, exponent, wall and slab loss): exponent
    within 0.3, every board given an offset within 1.5 dB of the negative of its true offset."""
    truth, plan, medians = recording
    fit = solve_fleet(medians, plan_geometry(plan), all_boards=[b.id for b in plan.boards])
    radio = truth.document["radio"]
    assert abs(fit.exponent - radio["exponent"]) < 0.3 and fit.exponent_plausible
    assert abs(fit.wall_db - radio["wall_db"]) < 1.5 and abs(fit.floor_db - radio["floor_db"]) < 3.0
    errors = {b.board: b.offset_db + truth.document["boards"][b.board]["true_offset_db"] for b in fit.boards}
    assert max(abs(e) for e in errors.values()) < 1.5, errors
    # Boards whose only reference tags are too weak to trust are listed, not given an offset.
    assert set(fit.unheard) == {"g1-a", "u2-a"}
    assert not set(errors) & set(fit.unheard)
    for b in fit.boards:
        assert 0 < b.stderr_db < 3.0 and b.tags >= 1


def test_held_losses_pin_the_exponent(recording):
    """The venue's own losses held (5 dB a wall, 15 dB a slab): same targets."""
    truth, plan, medians = recording
    fit = solve_fleet(medians, plan_geometry(plan), wall_db=5.0, floor_db=15.0)
    assert abs(fit.exponent - truth.document["radio"]["exponent"]) < 0.3
    assert (fit.wall_db, fit.floor_db) == (5.0, 15.0)
    for b in fit.boards:
        assert abs(b.offset_db + truth.document["boards"][b.board]["true_offset_db"]) < 1.5, b


def test_losses_held_when_the_pairs_cannot_fix_them(recording):
    """Cut at -100 dBm the recording's pairs no longer separate the losses from the exponent: without a
    fallback that is a clear error, with one the losses are held (and said so) and the targets still hold."""
    truth, plan, medians = recording
    with pytest.raises(ValueError, match="separate the exponent"):
        solve_fleet(medians, plan_geometry(plan), min_level_dbm=-100.0)
    fit = solve_fleet(medians, plan_geometry(plan), min_level_dbm=-100.0, fallback_losses=FALLBACK_LOSSES_DB)
    assert fit.losses_held and (fit.wall_db, fit.floor_db) == FALLBACK_LOSSES_DB
    assert abs(fit.exponent - truth.document["radio"]["exponent"]) < 0.3
    for b in fit.boards:
        assert abs(b.offset_db + truth.document["boards"][b.board]["true_offset_db"]) < 1.5, b


def test_plain_medians_of_far_pairs_read_too_strong(reports):
    """Without the correction for reports lost below the sensitivity the same solve misses the target."""
    truth, plan, raw = reports
    plain = pair_medians(*raw)
    fit = solve_fleet(plain, plan_geometry(plan), min_level_dbm=-100.0)
    errors = [b.offset_db + truth.document["boards"][b.board]["true_offset_db"] for b in fit.boards]
    assert abs(fit.exponent - truth.document["radio"]["exponent"]) > 0.3 or max(map(abs, errors)) > 1.5


def test_agrees_with_scipy_least_squares(recording):
    """Same data, same Huber threshold: the IRLS solve and least_squares(loss='huber') agree to 0.01 dB."""
    _, plan, medians = recording
    geometry = plan_geometry(plan)
    fit = solve_fleet(medians, geometry, min_level_dbm=-110.0)
    _, _, a, y = design(medians, geometry, min_level_dbm=-110.0)
    ref = least_squares(
        lambda th: y - a @ th,
        np.zeros(a.shape[1]),
        loss="huber",
        f_scale=fit.huber_k_db,
        xtol=1e-14,
        ftol=1e-14,
    )
    nb = len(fit.boards)
    assert np.max(np.abs(ref.x[:nb] - [b.offset_db for b in fit.boards])) < 0.01
    assert abs(ref.x[nb] - fit.exponent) < 0.01
    assert abs(ref.x[nb + 1] - fit.wall_db) < 0.01 and abs(ref.x[nb + 2] - fit.floor_db) < 0.01
    assert fit.huber_k_db == pytest.approx(HUBER_K * fit.sigma_db)


def test_an_outlying_pair_loses_weight():
    """A pair 20 dB off the model (a tag moved behind a metal cabinet) is down-weighted, offsets hold."""
    from listenpost.collector.models.calibration_fleet import PairGeometry

    rng = np.random.default_rng(3)
    truth = {f"b{i}": o for i, o in enumerate(rng.uniform(-4, 4, 6))}
    geometry, medians = {}, {}
    for b, o in truth.items():
        for t in range(5):
            d = float(rng.uniform(2, 25))
            geometry[(b, f"t{t}")] = PairGeometry(b, f"t{t}", d, 0, 0, -59.0)
            medians[(b, f"t{t}")] = (-59.0 - 27.0 * np.log10(d) - o + rng.normal(0, 0.3), 100)
    medians[("b0", "t0")] = (medians[("b0", "t0")][0] - 20.0, 100)
    fit = solve_fleet(medians, geometry, wall_db=0.0, floor_db=0.0, min_level_dbm=-200.0)
    assert fit.exponent == pytest.approx(2.7, abs=0.05)
    for bf in fit.boards:
        assert bf.offset_db == pytest.approx(truth[bf.board], abs=0.5)
    worst = min(fit.pairs, key=lambda p: p.weight)
    assert (worst.board, worst.tag) == ("b0", "t0") and worst.weight < 0.1


def test_too_few_pairs_is_a_clear_error():
    from listenpost.collector.models.calibration_fleet import PairGeometry

    g = {("a", "t"): PairGeometry("a", "t", 3.0, 0, 0, -59.0)}
    with pytest.raises(ValueError, match="pairs: 1 usable"):
        solve_fleet({("a", "t"): (-75.0, 100)}, g)


def test_propagation_defaults_against_published_figures():
    """FSPL in its dB form 20·log10(d) + 20·log10(f) − 147.55 (Friis, d in m, f in Hz) equals the model's
    free-space loss: 40.05 dB at 1 m, 2.4 GHz, the 1 m reference behind P1 = −59 dBm (docs/references.md §7).
    ITU-R P.1238's distance power-loss coefficients (N = 28 residential, 30 office at 2.4 GHz; 22 commercial at
    1.8–2 GHz; 31 office at 5.2 GHz; from memory) all give n = N/10 inside PLAUSIBLE_EXPONENT, and so does
    the simulated venue's n = 3."""
    import math

    from listenpost.collector.models.calibration import fspl_db
    from listenpost.collector.models.calibration_fleet import PLAUSIBLE_EXPONENT

    for d, f in ((1.0, 2.4e9), (1.0, 2.48e9), (13.5, 2.44e9)):
        assert fspl_db(d, f) == pytest.approx(20 * math.log10(d) + 20 * math.log10(f) - 147.55, abs=0.01)
    assert round(fspl_db(1.0, 2.4e9), 2) == 40.05
    lo, hi = PLAUSIBLE_EXPONENT
    for n_itu in (28, 30, 22, 31):
        assert lo <= n_itu / 10 <= hi
    assert lo <= 3.0 <= hi and lo <= 2.0 <= hi


async def test_cli_fleet_flags_and_missing_plan(server, tmp_path, capsys):
    """`calibrate --fleet` wants no NAME/--tag/--distance, the single-board form wants all three, --apply only
    goes with --fleet; without an imported plan the collector answers no_plan. Errors name the flag."""
    cli = test_admin_cli.cli

    assert await cli(server, tmp_path, "calibrate", "--fleet", "g0-a") != 0
    assert "--fleet: takes no NAME" in capsys.readouterr().err
    assert await cli(server, tmp_path, "calibrate", "g0-a", "--distance", "3") != 0
    assert "--tag: required without --fleet" in capsys.readouterr().err
    assert (
        await cli(
            server, tmp_path, "calibrate", "g0-a", "--tag", "lpx:00000001", "--distance", "3", "--apply"
        )
        != 0
    )
    assert "--apply: only with --fleet" in capsys.readouterr().err
    assert await cli(server, tmp_path, "calibrate", "--fleet") == 1
    assert "venue plan" in capsys.readouterr().err


@pytest.mark.parametrize("mu", [-80.0, -97.0, -103.0, -110.0])
def test_truncated_level_inverts_scipys_truncated_normal_mean(mu):
    """
    A pair heard near the board's floor shows only the reports above it, so its plain mean reads too
    strong. The level we solve for is the μ whose cut-off normal has the mean we saw; checked against
    ``scipy.stats.truncnorm`` (reference library), whose mean for μ we invert back to μ.
    """
    from scipy.stats import truncnorm

    from listenpost.collector.models.calibration_fleet import _truncated_mean_level

    floor, sigma = -100.5, 5.0
    seen = float(truncnorm.mean((floor - mu) / sigma, np.inf, loc=mu, scale=sigma))
    assert _truncated_mean_level(np.array([seen]), floor, sigma) == pytest.approx(mu, abs=1e-6)
