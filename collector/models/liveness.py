"""
Receiver states: from what a board sends (and fails to send) to one `BoardState` and a reason.

Pure and synchronous: `evaluate` takes one board's recent history and ``now`` and returns a
`Verdict`; `LivenessTracker` remembers each board's last state and returns a `StateChange` only when
it changes. The collector's periodic task loads the inputs from the store, calls the tracker, and
stores, logs and posts the changes. All times are collector Unix seconds.

Contact and the phi accrual detector (Hayashibara, Défago, Yared & Katayama, SRDS 2004): every request
from the board (heartbeat or batch) is a contact. From a sliding window of inter-contact intervals
(contacts closer than ``coalesce_s`` count as one, so a batch right behind a heartbeat does not drag
the mean down) we take mean μ and deviation σ, then

    φ(Δ) = −log10(1 − F(Δ)),   F = normal CDF with mean μ + acceptable_pause_s and σ ≥ min_std_s,

for Δ = now − last contact. φ = k means the chance that the board is merely slow is 10⁻ᵏ. The
survival function is computed in log space (`log10_sf`), so φ stays finite and exact far into the tail
where ``1 − F`` underflows. Hard bounds in seconds sit on top: never late before ``min_late_s``, never
silent before ``min_silent_s``, always silent from ``silent_after_s``.

Precedence when several rules hold (highest first), and why:

    retired > silent > deaf > drifting > backlogged > late > live

- *retired* is an operator decision and ends every other question.
- *silent* (no contact) makes the contact-based rules meaningless: their inputs are stale.
- *deaf*, *drifting* and *backlogged* are faults of a board that still talks to us; they are ordered by
  what they cost the study: a deaf board produces no data, a drifting one produces misplaced data, a
  backlogged one produces data late (but still produces it).
- *late* comes last among the non-live states: it is a transient suspicion that resolves by itself
  (either contact resumes or the board turns silent), and it must not hide a known fault.
"""

from __future__ import annotations

import enum
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from listenpost.collector.models.clock import ClockFit

_LN10 = math.log(10.0)
_LOG_SQRT_2PI = 0.5 * math.log(2.0 * math.pi)


class BoardState(enum.Enum):
    """The collector's word for a board (docs/design.md §5)."""

    LIVE = "live"
    """In contact on schedule, radio hearing, clock within tolerance, spool keeping up."""
    LATE = "late"
    """Contact overdue: suspicion is rising (φ past the late threshold) but not yet conclusive."""
    SILENT = "silent"
    """No contact past the threshold (φ past the silent threshold, or the hard limit in seconds)."""
    DEAF = "deaf"
    """Still in contact, but its radio has counted no advertisements for a while as other boards hear tags."""
    DRIFTING = "drifting"
    """Clock skew or offset residual past tolerance, or a clock step not long ago."""
    BACKLOGGED = "backlogged"
    """Its spool keeps growing across heartbeats: the uplink is slower than intake."""
    RETIRED = "retired"
    """Taken out of service by an operator; no longer watched."""


def log_sf(z: float) -> float:
    """
    Natural log of the standard normal survival function, ``ln(1 − Φ(z))``, without underflow.

    ``erfc`` is accurate in the tail but its result underflows near z ≈ 38; beyond z = 30 the
    asymptotic (Mills ratio) series is used, whose truncation error there is below 1e-12 relative.
    """
    if z < 30.0:
        return math.log(0.5 * math.erfc(z / math.sqrt(2.0)))
    z2 = z * z
    series = 1.0 - 1.0 / z2 + 3.0 / z2**2 - 15.0 / z2**3 + 105.0 / z2**4 - 945.0 / z2**5
    return -0.5 * z2 - math.log(z) - _LOG_SQRT_2PI + math.log(series)


def log10_sf(z: float) -> float:
    """``log10(1 − Φ(z))`` for the standard normal Φ; see `log_sf`."""
    return log_sf(z) / _LN10


def phi(delta_s: float, mu_s: float, sigma_s: float) -> float:
    """
    Suspicion level φ = −log10(1 − F(Δ)) for a normal F with mean ``mu_s`` and deviation ``sigma_s``.

    Args:
        delta_s: time since the last contact, seconds.
        mu_s: expected interval, seconds.
        sigma_s: its standard deviation, seconds (> 0).

    Raises:
        ValueError: ``sigma_s`` is not positive or an argument is not finite.
    """
    if not (math.isfinite(delta_s) and math.isfinite(mu_s) and math.isfinite(sigma_s)):
        raise ValueError(
            f"phi: arguments must be finite, got delta={delta_s!r}, mu={mu_s!r}, sigma={sigma_s!r}"
        )
    if sigma_s <= 0:
        raise ValueError(f"phi: sigma must be > 0, got {sigma_s!r}")
    return -log10_sf((delta_s - mu_s) / sigma_s)


@dataclass(frozen=True, slots=True)
class LivenessSettings:
    """Thresholds of `evaluate`; the defaults suit 10 s heartbeats with batches in between."""

    heartbeat_s: float = 10.0
    """Expected interval between contacts until enough have been seen, seconds."""
    phi_window: int = 100
    """Inter-contact intervals kept for μ and σ."""
    min_intervals: int = 3
    """Below this many intervals μ = heartbeat_s and σ = heartbeat_s/4 (a first-contact estimate)."""
    coalesce_s: float = 1.0
    """Contacts closer than this to the previous one count as the same contact, seconds."""
    min_std_s: float = 1.0
    """Floor on σ, seconds: perfectly regular contacts would otherwise make φ explode at the first delay."""
    acceptable_pause_s: float = 10.0
    """Added to μ: one lost heartbeat on a loaded network raises no suspicion, seconds."""
    late_phi: float = 3.0
    """φ at which a board is late (0.1 % chance that it is merely slow)."""
    silent_phi: float = 8.0
    """φ at which a board is silent (the usual deployed conviction threshold)."""
    min_late_s: float = 15.0
    """Never late earlier than this after the last contact, seconds."""
    min_silent_s: float = 30.0
    """Never silent earlier than this after the last contact, seconds."""
    silent_after_s: float = 45.0
    """Always silent from this long after the last contact, whatever φ says, seconds. With an
    evaluation every few seconds a dead board is flagged well within a minute."""
    deaf_window_s: float = 40.0
    """The advert counter must stay flat for this long before a board is deaf, seconds."""
    deaf_min_others_readings: int = 10
    """...while other boards stored at least this many registered-tag readings in that window."""
    skew_tolerance_ppm: float = 50.0
    """|skew| above this is drifting, ppm."""
    residual_tolerance_ms: float = 50.0
    """Offset residual (RMS around the clock line) above this is drifting, milliseconds."""
    drift_min_span_s: float = 300.0
    """The skew rule waits until the clock fit spans this much board time, seconds."""
    drift_min_samples: int = 5
    """The residual rule waits for this many kept clock exchanges."""
    step_recent_s: float = 3600.0
    """A clock step keeps the board drifting for this long, seconds."""
    backlog_window_s: float = 300.0
    """Heartbeats from this long back are examined for spool growth, seconds."""
    backlog_min_heartbeats: int = 6
    """At least this many heartbeats must fall in the window."""
    backlog_min_growth: int = 5
    """Spool depth must have grown by at least this many batches across the window."""
    backlog_rising_share: float = 0.8
    """...and rise or stay level between at least this share of consecutive heartbeats."""

    def __post_init__(self) -> None:
        positive = (
            "heartbeat_s",
            "min_std_s",
            "late_phi",
            "silent_phi",
            "silent_after_s",
            "deaf_window_s",
            "skew_tolerance_ppm",
            "residual_tolerance_ms",
            "step_recent_s",
            "backlog_window_s",
        )
        for name in positive:
            value = getattr(self, name)
            if not (isinstance(value, int | float) and math.isfinite(value) and value > 0):
                raise ValueError(f"LivenessSettings.{name}: must be a positive number, got {value!r}")
        for name in ("coalesce_s", "acceptable_pause_s", "min_late_s", "min_silent_s", "drift_min_span_s"):
            value = getattr(self, name)
            if not (isinstance(value, int | float) and math.isfinite(value) and value >= 0):
                raise ValueError(f"LivenessSettings.{name}: must be a number >= 0, got {value!r}")
        for name in (
            "phi_window",
            "min_intervals",
            "deaf_min_others_readings",
            "drift_min_samples",
            "backlog_min_heartbeats",
            "backlog_min_growth",
        ):
            value = getattr(self, name)
            if not isinstance(value, int) or value < 1:
                raise ValueError(f"LivenessSettings.{name}: must be an integer >= 1, got {value!r}")
        if not 0 < self.backlog_rising_share <= 1:
            raise ValueError(
                f"LivenessSettings.backlog_rising_share: must be in (0, 1], got {self.backlog_rising_share!r}"
            )
        if self.late_phi >= self.silent_phi:
            raise ValueError(
                f"LivenessSettings.late_phi: must be below silent_phi ({self.silent_phi!r}), "
                f"got {self.late_phi!r}"
            )
        if not self.min_late_s <= self.min_silent_s <= self.silent_after_s:
            raise ValueError(
                "LivenessSettings.min_silent_s: need min_late_s <= min_silent_s <= silent_after_s, got "
                f"{self.min_late_s!r}, {self.min_silent_s!r}, {self.silent_after_s!r}"
            )


@dataclass(frozen=True, slots=True)
class HeartbeatSample:
    """The part of one heartbeat the liveness rules read."""

    at: float
    """Collector time the heartbeat arrived, Unix seconds."""
    adverts_seen: int
    """Advertisements the radio delivered since the agent started (all devices, not only registered
    tags: a board in an empty room still hears phones), cumulative count. A decrease means the
    agent restarted."""
    spool_batches: int
    """Sealed batches waiting in the spool for upload."""


@dataclass(frozen=True, slots=True)
class BoardInputs:
    """Everything `evaluate` needs about one board."""

    board: str
    """Board name."""
    contacts: Sequence[float] = ()
    """Collector arrival times of the board's requests (heartbeats and batches), Unix seconds, ascending.
    The last ``phi_window + 1`` or so are enough."""
    heartbeats: Sequence[HeartbeatSample] = ()
    """Recent heartbeats, oldest first, covering at least ``max(deaf_window_s, backlog_window_s)``
    plus one earlier heartbeat."""
    clock: ClockFit | None = None
    """The board's current clock fit (current boot), if any."""
    retired: bool = False
    """The board was retired by an operator."""
    others_readings: int = 0
    """Registered-tag readings stored from *other* boards during the last ``deaf_window_s`` seconds."""


@dataclass(frozen=True, slots=True)
class Verdict:
    """The outcome of one evaluation."""

    state: BoardState
    reason: str
    """One line for people, e.g. ``"no contact for 47 s (limit 45 s)"``."""
    phi: float | None = None
    """Suspicion level at evaluation time (None without contact history)."""
    since_contact_s: float | None = None
    """Seconds since the last contact (None if never)."""


@dataclass(frozen=True, slots=True)
class StateChange:
    """A board changed state; the collector stores it as an event and may post it to a webhook."""

    board: str
    old: BoardState | None
    """Previous state; None the first time a board is evaluated."""
    new: BoardState
    at: float
    """Evaluation time, collector Unix seconds."""
    reason: str


@dataclass(frozen=True, slots=True)
class ContactStats:
    """Mean and deviation of inter-contact intervals as the detector uses them, seconds."""

    mu_s: float
    sigma_s: float
    intervals: int
    """Intervals the estimate rests on (0: first-contact estimate)."""


def contact_stats(contacts: Sequence[float] | np.ndarray, settings: LivenessSettings) -> ContactStats:
    """μ and σ of recent inter-contact intervals after coalescing (before the pause and σ floor)."""
    arr = np.asarray(contacts, dtype=np.float64)
    if arr.size and np.any(np.diff(arr) < 0):
        arr = np.sort(arr)
    kept = _coalesce(arr[-(settings.phi_window * 4 + 1) :], settings.coalesce_s)
    intervals = np.diff(kept)[-settings.phi_window :]
    if intervals.size < settings.min_intervals:
        return ContactStats(settings.heartbeat_s, settings.heartbeat_s / 4, 0)
    return ContactStats(float(intervals.mean()), float(intervals.std()), int(intervals.size))


def _coalesce(times: np.ndarray, gap_s: float) -> np.ndarray:
    if times.size == 0 or gap_s <= 0:
        return times
    keep = [0]
    last = times[0]
    for i in range(1, times.size):
        if times[i] - last >= gap_s:
            keep.append(i)
            last = times[i]
    return times[keep]


def evaluate(inputs: BoardInputs, now: float, settings: LivenessSettings | None = None) -> Verdict:
    """
    The state of one board at ``now`` (collector Unix seconds), by the rules and precedence of the module.

    Raises:
        ValueError: ``now`` is not finite.
    """
    s = settings or LivenessSettings()
    if not math.isfinite(now):
        raise ValueError(f"evaluate: now must be finite, got {now!r}")
    if inputs.retired:
        return Verdict(BoardState.RETIRED, "retired by an operator")
    if len(inputs.contacts) == 0:
        return Verdict(BoardState.SILENT, "no contact yet")

    last = float(np.max(np.asarray(inputs.contacts, dtype=np.float64)))
    since = max(0.0, now - last)
    stats = contact_stats(inputs.contacts, s)
    level = phi(since, stats.mu_s + s.acceptable_pause_s, max(stats.sigma_s, s.min_std_s))
    expect = f"expected every {stats.mu_s:.1f} s"

    def verdict(state: BoardState, reason: str) -> Verdict:
        return Verdict(state, reason, phi=level, since_contact_s=since)

    if since >= s.silent_after_s:
        return verdict(BoardState.SILENT, f"no contact for {since:.0f} s (limit {s.silent_after_s:.0f} s)")
    if level >= s.silent_phi and since >= s.min_silent_s:
        return verdict(BoardState.SILENT, f"no contact for {since:.0f} s, {expect} (phi {level:.1f})")

    hbs = _since_restart(inputs.heartbeats)
    if (reason := _deaf(hbs, inputs.others_readings, now, s)) is not None:
        return verdict(BoardState.DEAF, reason)
    if (reason := _drifting(inputs.clock, now, s)) is not None:
        return verdict(BoardState.DRIFTING, reason)
    if (reason := _backlogged(hbs, now, s)) is not None:
        return verdict(BoardState.BACKLOGGED, reason)
    if level >= s.late_phi and since >= s.min_late_s:
        return verdict(BoardState.LATE, f"no contact for {since:.0f} s, {expect} (phi {level:.1f})")
    return verdict(BoardState.LIVE, f"last contact {since:.0f} s ago")


def _since_restart(heartbeats: Sequence[HeartbeatSample]) -> list[HeartbeatSample]:
    hbs = sorted(heartbeats, key=lambda h: h.at)
    start = 0
    for i in range(1, len(hbs)):
        if hbs[i].adverts_seen < hbs[i - 1].adverts_seen:
            start = i  # counter went back: the agent restarted, older counts are another run's
    return hbs[start:]


def _deaf(hbs: list[HeartbeatSample], others: int, now: float, s: LivenessSettings) -> str | None:
    if len(hbs) < 2 or others < s.deaf_min_others_readings:
        return None
    cut = now - s.deaf_window_s
    baseline = next((h for h in reversed(hbs) if h.at <= cut), None)
    newest = hbs[-1]
    if baseline is None or newest.at <= baseline.at:
        return None  # the flat stretch does not yet cover the whole window
    if newest.adverts_seen - baseline.adverts_seen > 0:
        return None
    return (
        f"radio counted no advertisements in {newest.at - baseline.at:.0f} s while other boards stored "
        f"{others} tag readings"
    )


def _drifting(fit: ClockFit | None, now: float, s: LivenessSettings) -> str | None:
    if fit is None:
        return None
    recent = [st for st in fit.steps if now - st.at_collector_s <= s.step_recent_s]
    if recent:
        st = recent[-1]
        return f"clock stepped {st.size_s:+.3f} s {now - st.at_collector_s:.0f} s ago"
    if fit.skew_estimated and fit.span_s >= s.drift_min_span_s and abs(fit.skew_ppm) > s.skew_tolerance_ppm:
        return f"clock skew {fit.skew_ppm:+.1f} ppm (tolerance {s.skew_tolerance_ppm:.0f} ppm)"
    if fit.n_samples >= s.drift_min_samples and fit.residual_ms > s.residual_tolerance_ms:
        return f"clock offset residual {fit.residual_ms:.0f} ms (tolerance {s.residual_tolerance_ms:.0f} ms)"
    return None


def _backlogged(hbs: list[HeartbeatSample], now: float, s: LivenessSettings) -> str | None:
    window = [h for h in hbs if h.at >= now - s.backlog_window_s]
    if len(window) < s.backlog_min_heartbeats:
        return None
    depth = np.array([h.spool_batches for h in window], dtype=np.int64)
    growth = int(depth[-1] - depth[0])
    rising = float(np.mean(np.diff(depth) >= 0))
    if growth < s.backlog_min_growth or rising < s.backlog_rising_share:
        return None
    span = window[-1].at - window[0].at
    return f"spool grew by {growth} batches to {int(depth[-1])} in {span:.0f} s"


class LivenessTracker:
    """
    Keeps each board's last state and reports changes only.

    Example::

        tracker = LivenessTracker(settings, initial={b.name: b.state for b in stored})
        for inputs in per_board_inputs:
            if (change := tracker.update(inputs, now)) is not None:
                await store.add_event(...)
    """

    def __init__(
        self, settings: LivenessSettings | None = None, initial: Mapping[str, BoardState] | None = None
    ) -> None:
        self.settings = settings or LivenessSettings()
        self._states: dict[str, BoardState] = dict(initial or {})
        self._verdicts: dict[str, Verdict] = {}

    def update(self, inputs: BoardInputs, now: float) -> StateChange | None:
        """Evaluate one board; a `StateChange` if its state differs from the last one, else None."""
        v = evaluate(inputs, now, self.settings)
        self._verdicts[inputs.board] = v
        old = self._states.get(inputs.board)
        if old is v.state:
            return None
        self._states[inputs.board] = v.state
        return StateChange(board=inputs.board, old=old, new=v.state, at=now, reason=v.reason)

    def state(self, board: str) -> BoardState | None:
        """The board's current state, None if never evaluated."""
        return self._states.get(board)

    def verdict(self, board: str) -> Verdict | None:
        """The board's latest verdict (state, reason, φ), None if never evaluated."""
        return self._verdicts.get(board)

    def forget(self, board: str) -> None:
        """Drop a board (deleted from the fleet)."""
        self._states.pop(board, None)
        self._verdicts.pop(board, None)

    @property
    def states(self) -> dict[str, BoardState]:
        """A copy of every board's current state."""
        return dict(self._states)


__all__ = [
    "BoardInputs",
    "BoardState",
    "ContactStats",
    "HeartbeatSample",
    "LivenessSettings",
    "LivenessTracker",
    "StateChange",
    "Verdict",
    "contact_stats",
    "evaluate",
    "log10_sf",
    "log_sf",
    "phi",
]
