"""
Installer numerics: a board's RSSI offset from a reference tag, and the walk-test coverage report.

Path-loss model (log-distance; Rappaport, *Wireless Communications*, 2nd ed., §4.9): with P1 the
RSSI at 1 m and exponent n,

    RSSI(d) = P1 − 10·n·log10(d)          d = 10^((P1 − RSSI) / (10·n))

**Offset sign convention:** the offset is what to *add* to a board's raw RSSI so it reads like a
reference receiver. A board that hears the reference tag 3 dB too weak gets ``offset_db = +3``.

Pure and synchronous; the admin handler loads samples, calls these functions and stores the result.
"""

from __future__ import annotations

import enum
import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from listenpost.collector.store import WatchBaseline

SPEED_OF_LIGHT_M_S = 299_792_458.0
"""Exact by the SI definition of the metre."""


def rssi_at_distance(p1_dbm: float, exponent: float, distance_m: float | np.ndarray) -> float | np.ndarray:
    """Expected RSSI at ``distance_m`` metres: ``P1 − 10·n·log10(d)``, dBm."""
    _positive("distance_m", distance_m)
    _positive("exponent", exponent)
    return p1_dbm - 10.0 * exponent * np.log10(distance_m)


def distance_from_rssi(rssi_dbm: float | np.ndarray, p1_dbm: float, exponent: float) -> float | np.ndarray:
    """Distance in metres at which the model predicts ``rssi_dbm``: ``10^((P1 − RSSI)/(10·n))``."""
    _positive("exponent", exponent)
    return np.power(10.0, (p1_dbm - np.asarray(rssi_dbm, dtype=np.float64)) / (10.0 * exponent))


def fspl_db(distance_m: float, frequency_hz: float) -> float:
    """Free-space path loss (Friis), ``20·log10(4π·d·f/c)``, dB — the n = 2 special case of the model."""
    _positive("distance_m", distance_m)
    _positive("frequency_hz", frequency_hz)
    return 20.0 * math.log10(4.0 * math.pi * distance_m * frequency_hz / SPEED_OF_LIGHT_M_S)


class CalibrationWarning(enum.StrEnum):
    """Why a calibration result should be looked at before it is applied."""

    TOO_FEW_SAMPLES = "too_few_samples"
    """Fewer samples than ``min_samples``: the median is not yet stable."""
    SPREAD_TOO_WIDE = "spread_too_wide"
    """The interquartile range exceeds ``max_spread_db``: people or reflections moved around the tag."""
    OFFSET_LARGE = "offset_large"
    """|offset| exceeds ``max_offset_db``: wrong distance, wrong reference tag, or a damaged antenna."""


@dataclass(frozen=True, slots=True)
class CalibrationResult:
    """A board's offset from one reference-tag session."""

    offset_db: float
    """What to add to the board's raw RSSI, dB (see the module's sign convention)."""
    spread_db: float
    """Interquartile range of the samples, dB."""
    median_dbm: float
    """Median raw RSSI of the samples, dBm."""
    samples: int
    """Samples used."""
    distance_m: float
    """Measured distance between the board's antenna and the reference tag, metres."""
    warnings: tuple[CalibrationWarning, ...] = ()


def calibrate_offset(
    samples_dbm: Sequence[float] | np.ndarray,
    *,
    distance_m: float,
    p1_dbm: float,
    exponent: float = 2.0,
    min_samples: int = 30,
    max_spread_db: float = 6.0,
    max_offset_db: float = 15.0,
) -> CalibrationResult:
    """
    Board offset from raw RSSI samples of a reference tag at a measured distance.

    The median is corrected to 1 m with the log-distance model and compared with the tag's measured
    power: ``offset = P1 − (median + 10·n·log10(d))``.

    Args:
        samples_dbm: raw (uncalibrated) RSSI of the reference tag at this board, dBm.
        distance_m: measured distance, metres (> 0).
        p1_dbm: the reference tag's measured power, RSSI at 1 m on a reference receiver, dBm.
        exponent: path-loss exponent n (2 = free space; line of sight indoors is about 1.6–2).
        min_samples: fewer samples give `CalibrationWarning.TOO_FEW_SAMPLES`.
        max_spread_db: a wider IQR gives `CalibrationWarning.SPREAD_TOO_WIDE`.
        max_offset_db: a larger |offset| gives `CalibrationWarning.OFFSET_LARGE`.

    Raises:
        ValueError: no samples, a non-finite sample, or a non-positive distance or exponent
            (the message names the argument).
    """
    x = np.asarray(samples_dbm, dtype=np.float64)
    if x.ndim != 1 or x.size == 0:
        raise ValueError("samples_dbm: need at least one RSSI sample")
    if not np.all(np.isfinite(x)):
        bad = int(np.flatnonzero(~np.isfinite(x))[0])
        raise ValueError(f"samples_dbm[{bad}]: must be a finite number, got {x[bad]!r}")
    _positive("distance_m", distance_m)
    _positive("exponent", exponent)
    if not math.isfinite(p1_dbm):
        raise ValueError(f"p1_dbm: must be a finite number, got {p1_dbm!r}")
    median = float(np.median(x))
    q75, q25 = np.percentile(x, [75, 25])
    spread = float(q75 - q25)
    at_1m = median + 10.0 * exponent * math.log10(distance_m)
    offset = p1_dbm - at_1m
    warnings: list[CalibrationWarning] = []
    if x.size < min_samples:
        warnings.append(CalibrationWarning.TOO_FEW_SAMPLES)
    if spread > max_spread_db:
        warnings.append(CalibrationWarning.SPREAD_TOO_WIDE)
    if abs(offset) > max_offset_db:
        warnings.append(CalibrationWarning.OFFSET_LARGE)
    return CalibrationResult(
        offset_db=offset,
        spread_db=spread,
        median_dbm=median,
        samples=int(x.size),
        distance_m=float(distance_m),
        warnings=tuple(warnings),
    )


def _positive(name: str, value: float | np.ndarray) -> None:
    arr = np.asarray(value, dtype=np.float64)
    if not (np.all(np.isfinite(arr)) and np.all(arr > 0)):
        raise ValueError(f"{name}: must be a positive number, got {value!r}")


# -- walk test -----------------------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class WalkMark:
    """A technician's mark: the reference tag was in ``room`` from ``t_start`` to ``t_end``."""

    room: str
    t_start: float
    """Collector Unix seconds."""
    t_end: float
    """Collector Unix seconds (exclusive)."""


@dataclass(frozen=True, slots=True)
class WalkRow:
    """One reading of the walk-test tag."""

    board: str
    board_room: str
    t_collector: float
    """Collector Unix seconds."""
    rssi_dbm: float
    """Calibrated RSSI, dBm."""


@dataclass(frozen=True, slots=True)
class BoardHearing:
    """How one board heard the tag during one mark."""

    board: str
    room: str
    """The board's own room."""
    floor: str | None
    median_dbm: float
    readings: int


@dataclass(frozen=True, slots=True)
class RoomCoverage:
    """The walk-test verdict for one marked room."""

    room: str
    t_start: float
    t_end: float
    strongest: BoardHearing | None
    """The board with the highest median RSSI; None if no board heard the tag."""
    margin_db: float | None
    """Strongest median minus the runner-up's, dB; None with fewer than two boards."""
    strongest_in_room: bool
    """True when the strongest board belongs to the marked room."""
    overlap: tuple[BoardHearing, ...]
    """Boards of *other* rooms within ``overlap_db`` of the strongest, strongest first."""
    other_floor: tuple[BoardHearing, ...]
    """Of those, the ones on another floor than the marked room (needs floors)."""
    heard: tuple[BoardHearing, ...]
    """Every board that heard the tag during the mark, strongest first."""
    seconds_share: float
    """Share of whole seconds of the mark with at least one reading (any board), 0..1."""


def walk_report(
    marks: Iterable[WalkMark | tuple[str, float, float]],
    rows: Iterable[WalkRow | tuple[str, str, float, float]],
    *,
    overlap_db: float = 6.0,
    floors: Mapping[str, str] | None = None,
) -> list[RoomCoverage]:
    """
    Per marked room: the strongest board, its margin, overlapping boards of other rooms, coverage.

    Args:
        marks: ``(room, t_start, t_end)`` per room visited, collector Unix seconds.
        rows: the walk-test tag's readings as ``(board, board_room, t_collector, rssi_dbm)``.
        overlap_db: boards of other rooms whose median is within this of the strongest are overlap.
        floors: room → floor name, to single out overlap across floors.

    Returns:
        One `RoomCoverage` per mark, in the marks' order.

    Raises:
        ValueError: a mark ends before it starts, or a row's time or RSSI is not finite
            (names the mark or row index).
    """
    if overlap_db < 0:
        raise ValueError(f"overlap_db: must be >= 0, got {overlap_db!r}")
    mk = [m if isinstance(m, WalkMark) else WalkMark(*m) for m in marks]
    rw = [r if isinstance(r, WalkRow) else WalkRow(*r) for r in rows]
    for i, m in enumerate(mk):
        if not (math.isfinite(m.t_start) and math.isfinite(m.t_end)) or m.t_end <= m.t_start:
            raise ValueError(
                f"marks[{i}] ({m.room!r}): t_end must be after t_start, got {m.t_start!r}..{m.t_end!r}"
            )
    for i, r in enumerate(rw):
        if not (math.isfinite(r.t_collector) and math.isfinite(r.rssi_dbm)):
            raise ValueError(f"rows[{i}] ({r.board!r}): t_collector and rssi_dbm must be finite")
    floors = floors or {}
    t = np.array([r.t_collector for r in rw], dtype=np.float64)
    rssi = np.array([r.rssi_dbm for r in rw], dtype=np.float64)
    boards = np.array([r.board for r in rw], dtype=object)
    room_of = {r.board: r.board_room for r in rw}
    out: list[RoomCoverage] = []
    for m in mk:
        sel = (t >= m.t_start) & (t < m.t_end)
        heard = []
        for b in sorted(set(boards[sel])):
            vals = rssi[sel & (boards == b)]
            heard.append(
                BoardHearing(
                    board=b,
                    room=room_of[b],
                    floor=floors.get(room_of[b]),
                    median_dbm=float(np.median(vals)),
                    readings=int(vals.size),
                )
            )
        heard.sort(key=lambda h: (-h.median_dbm, h.board))
        n_seconds = max(1, math.ceil(m.t_end - m.t_start))
        covered = np.unique(np.floor(t[sel] - m.t_start).astype(np.int64)).size
        strongest = heard[0] if heard else None
        margin = heard[0].median_dbm - heard[1].median_dbm if len(heard) >= 2 else None
        overlap: tuple[BoardHearing, ...] = ()
        if strongest is not None:
            overlap = tuple(
                h for h in heard if h.room != m.room and h.median_dbm >= strongest.median_dbm - overlap_db
            )
        mark_floor = floors.get(m.room)
        other_floor = tuple(
            h for h in overlap if mark_floor is not None and h.floor is not None and h.floor != mark_floor
        )
        out.append(
            RoomCoverage(
                room=m.room,
                t_start=m.t_start,
                t_end=m.t_end,
                strongest=strongest,
                margin_db=margin,
                strongest_in_room=strongest is not None and strongest.room == m.room,
                overlap=overlap,
                other_floor=other_floor,
                heard=tuple(heard),
                seconds_share=covered / n_seconds,
            )
        )
    return out


# -- calibration watch ---------------------------------------------------------------------------------------

CALIBRATION_SHIFT_DB = 3.0
"""A board's reference-tag level this far from its level at calibration, sustained, raises
``calibration_shift``. Twice the fleet calibration's per-board tolerance (1.5 dB, docs/calibration.md), and
ten times the standard error of a 5-minute median (1.25·σ/√N ≈ 0.3 dB for σ = 5 dB shadowing and N ≈ 300
reports): noise does not reach it, a real change in gain (a loose antenna, a case closed around it) does.
At an exponent of 3 it is the level change of a 26 % change in distance."""
WATCH_WINDOW_S = 300.0
"""The rolling window each level is the median of, seconds."""
WATCH_SUSTAIN_S = 300.0
"""A shift must hold this long before it is an event: a visitor standing between tag and board for a few
minutes is not a change in the board."""
WATCH_MIN_READINGS = 30
"""Fewer readings of a tag in the window: that tag is left out of this round's comparison."""


@dataclass(frozen=True, slots=True)
class CalibrationShift:
    """A sustained change in a board's reference-tag level since calibration."""

    board: str
    shift_db: float
    """Median over the reference tags of (level now − level at calibration), dB; negative: hears weaker."""
    tags: int
    since: float
    """When the shift first passed the threshold, collector Unix seconds."""


@dataclass(slots=True)
class _BoardWatch:
    marker: float
    baseline_from: float
    """The baseline is the first full window starting here (calibration, or watching began)."""
    baseline: dict[str, float]
    since: float | None = None
    raised: bool = False
    last: float | None = None

    def saved(self, board: str) -> WatchBaseline:
        return WatchBaseline(
            board, self.marker, self.baseline_from, dict(self.baseline), self.since, self.raised
        )


class CalibrationWatch:
    """
    Each board's raw reference-tag level (median over a rolling window) against its level at calibration.

    The level at calibration is the first full window after the board's latest calibration (a change of
    its offset marks one) or after watching began. A board whose median shift over its reference tags
    stays beyond ``threshold_db`` for ``sustain_s`` gives one `CalibrationShift`; it can give another
    only after the shift fell back under half the threshold, or after a new calibration.

    Its memory per board is a `WatchBaseline`: start from the stored ones (``saved``) and store
    `changed` after each round, so a restart or another collector taking the lead goes on comparing
    against the level at calibration instead of learning a level that may already carry a shift.
    """

    def __init__(
        self,
        *,
        threshold_db: float = CALIBRATION_SHIFT_DB,
        window_s: float = WATCH_WINDOW_S,
        sustain_s: float = WATCH_SUSTAIN_S,
        min_readings: int = WATCH_MIN_READINGS,
        saved: Mapping[str, WatchBaseline] | None = None,
    ) -> None:
        self.threshold_db = threshold_db
        self.window_s = window_s
        self.sustain_s = sustain_s
        self.min_readings = min_readings
        self._boards = {
            b: _BoardWatch(w.marker, w.baseline_from, dict(w.levels), w.shift_since, w.raised)
            for b, w in (saved or {}).items()
        }
        self._changed: set[str] = set()

    def changed(self) -> list[WatchBaseline]:
        """The boards whose memory changed since the last call, to store."""
        out = [self._boards[b].saved(b) for b in sorted(self._changed)]
        self._changed.clear()
        return out

    def shift(self, board: str) -> float | None:
        """The board's latest shift, dB (None before it has a baseline)."""
        w = self._boards.get(board)
        return None if w is None else w.last

    def update(
        self,
        now: float,
        levels: Mapping[tuple[str, str], tuple[float, int]],
        markers: Mapping[str, float],
    ) -> list[CalibrationShift]:
        """
        One round.

        Args:
            now: collector Unix seconds.
            levels: (board, tag) → (median raw RSSI over the window ending at ``now``, readings).
            markers: board → its current offset (a change means it was calibrated again).
        Returns:
            The shifts that became sustained this round.
        """
        out = []
        for board, marker in markers.items():
            w = self._boards.get(board)
            if w is None or w.marker != marker:
                # New or recalibrated: its baseline is the first full window from now.
                self._boards[board] = _BoardWatch(marker, now, {})
                self._changed.add(board)
                continue
            before = (len(w.baseline), w.since, w.raised)
            shift = self._compare(board, w, now, levels)
            if shift is not None:
                out.append(shift)
            if (len(w.baseline), w.since, w.raised) != before:
                self._changed.add(board)
        return out

    def _compare(
        self, board: str, w: _BoardWatch, now: float, levels: Mapping[tuple[str, str], tuple[float, int]]
    ) -> CalibrationShift | None:
        mine = {t: lv for (b, t), (lv, n) in levels.items() if b == board and n >= self.min_readings}
        if not w.baseline:
            if now - w.baseline_from >= self.window_s and mine:
                w.baseline = mine
            return None
        deltas = [lv - w.baseline[t] for t, lv in mine.items() if t in w.baseline]
        for t, lv in mine.items():
            w.baseline.setdefault(t, lv)  # a tag first heard later joins at its own level
        if not deltas:
            return None
        shift = float(np.median(deltas))
        w.last = shift
        if abs(shift) >= self.threshold_db:
            if w.since is None:
                w.since = now
            if not w.raised and now - w.since >= self.sustain_s:
                w.raised = True
                return CalibrationShift(board, shift, len(deltas), w.since)
        else:
            w.since = None
            if abs(shift) < self.threshold_db / 2:
                w.raised = False
        return None


__all__ = [
    "CALIBRATION_SHIFT_DB",
    "BoardHearing",
    "CalibrationShift",
    "CalibrationWatch",
    "CalibrationResult",
    "CalibrationWarning",
    "RoomCoverage",
    "SPEED_OF_LIGHT_M_S",
    "WalkMark",
    "WalkRow",
    "calibrate_offset",
    "distance_from_rssi",
    "fspl_db",
    "rssi_at_distance",
    "walk_report",
]
