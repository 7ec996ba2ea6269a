"""
The simulator's radio model: what RSSI a board reports for one advertisement, and whether it hears it.

Mean received power follows the log-distance path-loss model (Rappaport, *Wireless Communications*,
§4.9) from a 1 m reference, minus a fixed loss per wall and per floor slab crossed::

    mean_dBm = P1 − 10·n·log10(max(d, 1 m)) − walls·L_wall − floors·L_floor

Each advertisement then gets independent Gaussian shadowing (σ dB), the board's hidden offset is added,
the result is rounded to whole dBm as a controller reports it, reports below the sensitivity are lost,
and the rest are heard with a fixed probability (collisions, scan-window gaps).
"""

from __future__ import annotations

import numpy as np

from listenpost.sim.scenario import RadioSpec

#: The model is defined from the 1 m reference outward; closer than that we hold the 1 m value.
REFERENCE_DISTANCE_M = 1.0


def mean_rssi_dbm(
    p1_dbm: np.ndarray | float,
    distance_m: np.ndarray,
    walls: np.ndarray,
    floors: np.ndarray,
    radio: RadioSpec,
) -> np.ndarray:
    """
    Mean RSSI before shadowing and board offset, dBm.

    Args:
        p1_dbm: transmitter's RSSI at 1 m, dBm.
        distance_m: straight-line distance, metres.
        walls: walls crossed.
        floors: floor slabs crossed.
    """
    d = np.maximum(np.asarray(distance_m, dtype=float), REFERENCE_DISTANCE_M)
    return (
        np.asarray(p1_dbm, dtype=float)
        - 10.0 * radio.exponent * np.log10(d)
        - radio.wall_db * np.asarray(walls)
        - radio.floor_db * np.asarray(floors)
    )


def sample_reports(
    mean_dbm: np.ndarray, offset_db: np.ndarray | float, radio: RadioSpec, rng: np.random.Generator
) -> tuple[np.ndarray, np.ndarray]:
    """
    Draw what boards report for advertisements with the given mean RSSI.

    Args:
        mean_dbm: mean RSSI per (advertisement, board), dBm.
        offset_db: each board's hidden offset, broadcast against ``mean_dbm``, dB.
    Returns:
        ``(rssi, heard)``: whole-dBm reports (int16) and a boolean mask of the ones a board delivers.
    """
    shadow = rng.standard_normal(mean_dbm.shape, dtype=np.float32) * np.float32(radio.shadowing_sigma_db)
    rssi = np.rint(mean_dbm + shadow + offset_db).astype(np.int16)
    heard = rssi >= radio.sensitivity_dbm
    if radio.hear_probability < 1.0:
        heard &= rng.random(mean_dbm.shape, dtype=np.float32) < radio.hear_probability
    # Controllers report int8 RSSI and reserve 127 for "not available": clip to what a report can carry.
    return np.clip(rssi, -127, 20), heard
