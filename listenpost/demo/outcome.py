"""
What a run concluded, board by board, beside the simulator's truth.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

from listenpost.sim.truth import BoardTruth


@dataclass(frozen=True, slots=True)
class BoardSummary:
    """One board at the end of a run: what the collector concluded, beside the truth."""

    name: str
    room: str
    state: str
    expected_state: str
    readings_stored: int
    skew_est_ppm: float | None
    skew_true_ppm: float
    offset_est_s: float | None
    """Collector time − board monotonic time at ``offset_at_board_s``, as the collector's clock fit says."""
    offset_true_s: float | None
    """The same, true (from the board's derived clock)."""
    offset_error_ms: float | None
    offset_at_board_s: float | None
    """Board monotonic seconds where the offset is compared: the newest clock exchange the fit kept."""
    wall_error_est_s: float | None
    """The collector's estimate of the board's wall-clock error, seconds."""
    wall_error_true_s: float
    state_reason: str | None

    @property
    def skew_error_ppm(self) -> float | None:
        return None if self.skew_est_ppm is None else self.skew_est_ppm - self.skew_true_ppm

    def to_json(self) -> dict[str, Any]:
        return {
            "name": self.name,
            "room": self.room,
            "state": self.state,
            "expected_state": self.expected_state,
            "readings_stored": self.readings_stored,
            "skew_est_ppm": self.skew_est_ppm,
            "skew_true_ppm": self.skew_true_ppm,
            "skew_error_ppm": self.skew_error_ppm,
            "offset_est_s": self.offset_est_s,
            "offset_true_s": self.offset_true_s,
            "offset_error_ms": self.offset_error_ms,
            "offset_at_board_s": self.offset_at_board_s,
            "wall_error_est_s": self.wall_error_est_s,
            "wall_error_true_s": self.wall_error_true_s,
            "state_reason": self.state_reason,
        }


def expected_state(truth: BoardTruth, skew_tolerance_ppm: float) -> str:
    """The state the collector should end on for this board, from the faults the simulator put in."""
    if truth.power_off_at_s is not None:
        return "silent"
    if truth.radio_hang_at_s is not None:
        return "deaf"
    if abs(truth.skew_ppm) > skew_tolerance_ppm:
        return "drifting"
    return "live"


CALIBRATION_TOLERANCE_DB = 1.5
"""How close the fleet calibration must come to each board's true correction on the demo venue, dB
(docs/calibration.md)."""


def calibration_errors(fit: dict[str, Any], boards: Iterable[BoardTruth]) -> dict[str, float]:
    """
    Board → fitted offset minus its true correction, dB, for every board the fleet calibration fitted.

    ``fit`` is the collector's answer (``POST /v1/admin/calibrate/fleet``). The true correction is the
    negative of what the board's adapter adds (``true_offset_db``), plus nothing for a gain step: the demo's
    recording ends before the one the venue plants (docs/demo-venue.md).
    """
    truth = {b.name: b for b in boards}
    return {
        b["board"]: b["offset_db"] + truth[b["board"]].true_offset_db
        for b in fit["boards"]
        if b.get("offset_db") is not None and b["board"] in truth
    }
