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
