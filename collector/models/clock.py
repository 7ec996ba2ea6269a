"""
Board clock → collector clock, per (board, boot), from four-timestamp exchanges.

Every uplink carries the previous exchange's T1..T4 (docs/design.md §3): T1 board send and T4 board
receive in *board monotonic seconds*, T2 collector receive and T3 collector reply in *collector Unix
seconds*. The RFC 5905 on-wire formulas give, per exchange,

    offset θ = ((T2 − T1) + (T3 − T4)) / 2        delay δ = (T4 − T1) − (T3 − T2)

so θ here is ``collector_time − board_monotonic`` (about 1.8e9 s, not a small correction) and the
true value lies within θ ± δ/2. The model per boot segment is a line in board time::

    collector_time(b) = b + offset_s + slope · (b − ref_board_s)      slope = 1/(1 + skew_ppm·1e-6) − 1

``skew_ppm`` is the board clock's rate error against the collector's, positive when the board runs
fast — the same sign as `listenpost.core.clock.DerivedClock`'s ``skew_ppm`` (a board at +85 ppm reports +85,
and its offset θ then *falls* by about 85 µs per board second).

Method, and why:

1. **Minimum-delay selection** (RFC 5905 §10 clock filter, windowed): exchanges are grouped into
   windows of ``window_s`` board seconds and only the ``keep_per_window`` lowest-δ exchanges of each
   window are kept. Queueing only ever adds delay, so low-δ exchanges carry the least offset error;
   it also bounds memory to a few samples per window.
2. **Envelope fit.** Forward one-way "delays" ``T2 − T1 = θ(T1) + out`` lie on or above the line
   θ(b) + min(out); backward ``T3 − T4 = θ(T4) − back`` lie on or below θ(b) − min(back). Queueing
   only pushes points away from these envelopes, so fitting the envelopes ignores it by construction.
   Two solvers, chosen by ``ClockSettings.method``:

   - ``FitMethod.BAND`` (default): the line that stays inside the band "under every forward point,
     above every backward point" with the largest margin to both sides — a three-variable linear
     programme (maximise m subject to line + m ≤ forward, line − m ≥ backward). Its objective is
     concave and piecewise linear in the slope, so it is solved by a golden-section search on the
     slope (no LP solver at runtime). The slope is pinned by the lowest-delay points at the two
     ends of the span, which is why it is less noisy than ENVELOPE.
   - ``FitMethod.ENVELOPE``: the Moon, Skelly & Towsley (INFOCOM 1999) linear programme on each side
     — line under all points minimising the summed vertical distance, solved exactly as the
     lower-convex-hull edge above the mean abscissa (`lower_envelope`) — and the average of the
     forward and backward lines. Its slope comes from the two hull points around the mean abscissa
     only, so it is noisier when they are close together.

   Both assume min(out) ≈ min(back), as NTP does; both are checked against ``scipy.optimize.linprog``
   in the tests. Measured on synthetic exchanges (1–50 ms asymmetric random delays, 10 s heartbeats,
   30 min, 200 seeds, +85 ppm, defaults): BAND skew error median 0.14 ppm, max 1.6 ppm; ENVELOPE median 0.24 ppm,
   max 3.0 ppm; offset error below 3 ms for both (bench/clock_fit.py).
3. **Step detection**: a new exchange whose θ misses the current line by more than
   ``step_tolerance_s + δ/2`` is held back; ``step_confirm`` such exchanges that agree with each other
   start a new segment (a step, reported with its size and time); one that fits the old line again
   discards them as outliers. A step is therefore reported only once confirmed, never before.

RFC 5905 section numbers cited here (§8 on-wire, §10 clock filter) are from memory; the formulas are
checked against ntplib in the tests.

Everything is pure and synchronous: the collector's handler loads samples, calls ``add``/``fit`` and
stores the result. Large Unix times are made relative to a per-segment reference before fitting so
float64 keeps sub-microsecond resolution.
"""

from __future__ import annotations

import dataclasses
import enum
import math
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from listenpost.core.timesync import offset_delay


def lower_envelope(t: Sequence[float] | np.ndarray, d: Sequence[float] | np.ndarray) -> tuple[float, float]:
    """
    The Moon–Skelly–Towsley line: ``alpha·t + beta <= d`` for every point, minimising Σ(d − alpha·t − beta).

    Equivalent to maximising ``alpha·mean(t) + beta`` under the constraints, whose optimum is the edge
    of the lower convex hull that spans ``mean(t)``. When ``mean(t)`` falls exactly on a hull vertex
    every slope between its two edges is optimal; the midpoint slope is returned (deterministic).

    Args:
        t: abscissae (e.g. board seconds, relative to a reference).
        d: ordinates (e.g. one-way delay or offset, seconds, relative to a reference).

    Returns:
        ``(alpha, beta)``; alpha is dimensionless (×1e6 for ppm).

    Raises:
        ValueError: fewer than two distinct abscissae, or lengths differ, or non-finite values.
    """
    ta = np.asarray(t, dtype=np.float64)
    da = np.asarray(d, dtype=np.float64)
    if ta.shape != da.shape or ta.ndim != 1:
        raise ValueError(f"t and d must be 1-D of equal length, got {ta.shape} and {da.shape}")
    if not (np.all(np.isfinite(ta)) and np.all(np.isfinite(da))):
        raise ValueError("t and d must be finite")
    order = np.lexsort((da, ta))
    ts, ds = ta[order], da[order]
    # For equal t only the lowest d can touch the lower hull.
    first = np.ones(len(ts), dtype=bool)
    first[1:] = ts[1:] != ts[:-1]
    ts, ds = ts[first], ds[first]
    if len(ts) < 2:
        raise ValueError("need at least two distinct abscissae for a line")
    hull: list[int] = []
    for i in range(len(ts)):  # Andrew's monotone chain, lower half
        while len(hull) >= 2:
            a, b = hull[-2], hull[-1]
            cross = (ts[b] - ts[a]) * (ds[i] - ds[a]) - (ds[b] - ds[a]) * (ts[i] - ts[a])
            if cross <= 0:
                hull.pop()
            else:
                break
        hull.append(i)
    ht, hd = ts[hull], ds[hull]
    tbar = float(ta.mean())
    slopes = np.diff(hd) / np.diff(ht)
    k = int(np.searchsorted(ht, tbar, side="left"))
    if k < len(ht) and ht[k] == tbar:
        # Exactly on a vertex: any slope between the neighbouring edges is optimal.
        left = slopes[k - 1] if k > 0 else slopes[k]
        right = slopes[k] if k < len(slopes) else slopes[k - 1]
        alpha = float((left + right) / 2)
        beta = float(hd[k] - alpha * ht[k])
        return alpha, beta
    k = min(max(k, 1), len(ht) - 1)  # edge (k-1, k) spans tbar
    alpha = float(slopes[k - 1])
    beta = float(hd[k - 1] - alpha * ht[k - 1])
    return alpha, beta


def wall_error_s(board_wall: float | np.ndarray, t_collector: float | np.ndarray) -> float | np.ndarray:
    """
    How wrong the board's wall clock is: ``board_wall − t_collector``, seconds (positive = board ahead).

    A health figure only — readings never use the board's wall clock. Pass the board's wall-clock
    reading and the collector time of the same instant, e.g. ``fit.to_collector_time(t1 * 1000)``
    for a heartbeat whose ``wall`` was read at T1.
    """
    if isinstance(board_wall, np.ndarray) or isinstance(t_collector, np.ndarray):
        return np.subtract(board_wall, t_collector)
    return float(board_wall) - float(t_collector)


SLOPE_RESOLUTION = 1e-12
"""Where `band_fit`'s search stops: 1e-6 ppm, which moves a line spanning the 6 h horizon by 0.02 µs at
its ends. Each further step costs a pass over every kept exchange, and a settled board refits once a
window."""


def band_fit(
    t_upper: np.ndarray, upper: np.ndarray, t_lower: np.ndarray, lower: np.ndarray, max_slope: float = 2e-3
) -> tuple[float, float, float]:
    """
    The widest-margin line between two point sets: below every ``upper`` point, above every ``lower`` one.

    Solves: maximise m over (alpha, beta, m) subject to ``alpha·t + beta + m <= upper`` and
    ``alpha·t + beta − m >= lower``. For a fixed alpha the best beta and m are closed-form, and the
    resulting margin is concave in alpha, so a golden-section search over
    ``[-max_slope, max_slope]`` finds the optimum. When the sets overlap (no line fits between them)
    the margin is negative and the line is the minimax compromise.

    Returns:
        ``(alpha, beta, margin)``; margin is half the band width left at the optimum (same unit as
        the ordinates).

    Raises:
        ValueError: an empty side or mismatched lengths.
    """
    tu, u = np.asarray(t_upper, np.float64), np.asarray(upper, np.float64)
    tl, lo = np.asarray(t_lower, np.float64), np.asarray(lower, np.float64)
    if tu.shape != u.shape or tl.shape != lo.shape or u.size == 0 or lo.size == 0:
        raise ValueError("band_fit needs non-empty upper and lower sets with matching t arrays")

    def margin(alpha: float) -> float:
        return float(np.min(u - alpha * tu) - np.max(lo - alpha * tl))

    a, b = -max_slope, max_slope
    g = (math.sqrt(5.0) - 1.0) / 2.0
    x1, x2 = b - g * (b - a), a + g * (b - a)
    m1, m2 = margin(x1), margin(x2)
    while b - a > SLOPE_RESOLUTION:  # about 46 steps from the full bracket
        if m1 < m2:
            a, x1, m1 = x1, x2, m2
            x2 = a + g * (b - a)
            m2 = margin(x2)
        else:
            b, x2, m2 = x2, x1, m1
            x1 = b - g * (b - a)
            m1 = margin(x1)
    alpha = (a + b) / 2
    top = float(np.min(u - alpha * tu))
    bottom = float(np.max(lo - alpha * tl))
    return alpha, (top + bottom) / 2, (top - bottom) / 2


class FitMethod(enum.Enum):
    """How `ClockModel` turns kept exchanges into a line (see the module docstring)."""

    BAND = "band"
    """Widest-margin line between forward and backward envelopes (default)."""
    ENVELOPE = "envelope"
    """Moon–Skelly–Towsley lower envelope forward, upper envelope backward, lines averaged."""


@dataclass(frozen=True, slots=True)
class ClockSettings:
    """Tuning of `ClockModel`; defaults suit exchanges every few seconds to every 10 s."""

    window_s: float = 60.0
    """Width of a selection window, board seconds."""
    keep_per_window: int = 6
    """Lowest-delay exchanges kept per window."""
    horizon_s: float = 6 * 3600.0
    """Only windows this recent (board seconds before the newest exchange) enter the fit; a crystal's
    rate follows temperature, so older exchanges describe a different rate."""
    min_skew_span_s: float = 120.0
    """Below this span of kept exchanges, skew is reported as 0 and the offset is the min-delay pick."""
    max_delay_s: float = 5.0
    """Exchanges with a larger round-trip delay carry too little information and are ignored."""
    step_tolerance_s: float = 0.1
    """An exchange whose offset misses the line by more than this plus δ/2 is a step candidate."""
    step_confirm: int = 3
    """Consecutive agreeing candidates that confirm a step."""
    max_skew_ppm: float = 500.0
    """Assumed worst rate error while the skew is not yet estimated (widens the step test)."""
    method: FitMethod = FitMethod.BAND
    """Line fit; see the module docstring."""
    max_step_s: float = 600.0
    """An exchange whose offset misses the fitted line by more than this (plus δ/2) is refused as
    implausible (`ClockModel.implausible`): never a sample, never a step candidate. A collector clock
    corrected by more than this needs the boards' next boot to be followed."""

    def __post_init__(self) -> None:
        for name in (
            "window_s",
            "horizon_s",
            "max_delay_s",
            "step_tolerance_s",
            "max_skew_ppm",
            "max_step_s",
        ):
            value = getattr(self, name)
            if not (isinstance(value, int | float) and math.isfinite(value) and value > 0):
                raise ValueError(f"ClockSettings.{name}: must be a positive number, got {value!r}")
        if self.min_skew_span_s < 0:
            raise ValueError(f"ClockSettings.min_skew_span_s: must be >= 0, got {self.min_skew_span_s!r}")
        for name in ("keep_per_window", "step_confirm"):
            value = getattr(self, name)
            if not isinstance(value, int) or value < 1:
                raise ValueError(f"ClockSettings.{name}: must be an integer >= 1, got {value!r}")


NEGATIVE_DELAY_SLACK_S = 0.001
"""A round trip may come out this much below zero from float rounding of Unix seconds (about 2e-7 s
at 1.8e9) and skew over a short exchange; more than this and one of the four stamps is false."""


@dataclass(frozen=True, slots=True)
class ClockStep:
    """A sudden jump of the board-to-collector offset."""

    at_board_s: float
    """Board monotonic time of the first exchange after the step, seconds."""
    at_collector_s: float
    """Collector Unix time (T2) of that exchange, seconds."""
    size_s: float
    """New offset minus the old line's prediction, seconds (positive: collector time jumped ahead
    relative to the board)."""


@dataclass(frozen=True, slots=True)
class ClockFit:
    """The current line of one boot segment: ``collector = b + offset_s + slope·(b − ref_board_s)``."""

    offset_s: float
    """collector time − board time at ``ref_board_s``, seconds (about 1.8e9)."""
    ref_board_s: float
    """Board monotonic seconds where ``offset_s`` applies (the newest kept exchange)."""
    skew_ppm: float
    """Board clock rate error relative to the collector, parts per million (positive: board fast,
    so the offset falls as board time passes)."""
    residual_ms: float
    """RMS of kept exchanges' offsets around the line, milliseconds."""
    n_samples: int
    """Kept (minimum-delay) exchanges the fit used."""
    span_s: float
    """Board-time span of those exchanges, seconds."""
    skew_estimated: bool
    """False while the span is below ``min_skew_span_s`` (skew is then reported as 0)."""
    segment_start_board_s: float
    """Board time where this segment starts (the boot's first exchange, or the last step)."""
    steps: tuple[ClockStep, ...] = ()
    """Every step confirmed in this boot, oldest first."""

    @property
    def slope(self) -> float:
        """d(offset)/d(board time), dimensionless: ``1/(1 + skew_ppm·1e-6) − 1``."""
        return _slope_from_skew(self.skew_ppm)

    def offset_at(self, board_s: float | np.ndarray) -> float | np.ndarray:
        """collector − board offset at board time ``board_s``, seconds."""
        return self.offset_s + self.slope * (np.asarray(board_s, dtype=np.float64) - self.ref_board_s)

    def to_collector_time(self, board_ms: np.ndarray) -> np.ndarray:
        """Board monotonic milliseconds → collector Unix seconds with this line (float64 array)."""
        b = np.asarray(board_ms, dtype=np.float64) / 1000.0
        return b + self.offset_s + self.slope * (b - self.ref_board_s)


def _slope_from_skew(skew_ppm: float) -> float:
    s = skew_ppm * 1e-6
    return -s / (1.0 + s)


def _skew_from_slope(slope: float) -> float:
    # collector = c + board/(1+s) gives slope = 1/(1+s) − 1, hence s = −slope/(1+slope).
    return -slope / (1.0 + slope) * 1e6


@dataclass(slots=True)
class _Sample:
    t1: float
    t2: float
    t3: float
    t4: float
    offset: float
    delay: float

    @property
    def mid(self) -> float:
        return (self.t1 + self.t4) / 2


_SETTLED_WINDOWS = 10
"""Span of a segment's line, in windows, from which it is refitted once per window (`_fit_segment`)."""


@dataclass(slots=True)
class _Segment:
    start_b: float
    theta_ref: float
    windows: dict[int, list[_Sample]] = field(default_factory=dict)
    fit: ClockFit | None = None
    dirty: bool = True
    fit_window: int | None = None
    """Newest window index when ``fit`` was computed."""
    newest: int | None = None
    """Newest window index of any sample."""

    def add(self, s: _Sample, settings: ClockSettings) -> None:
        idx = math.floor((s.mid - self.start_b) / settings.window_s)
        if self.newest is None or idx > self.newest:
            self.newest = idx
        kept = self.windows.setdefault(idx, [])
        kept.append(s)
        kept.sort(key=lambda x: x.delay)
        del kept[settings.keep_per_window :]
        # A sample slower than every one its window keeps changes nothing the line rests on: no refit.
        self.dirty = self.dirty or any(x is s for x in kept)

    def kept(self, settings: ClockSettings) -> list[_Sample]:
        if not self.windows:
            return []
        newest = max(self.windows)
        oldest_ok = newest - math.ceil(settings.horizon_s / settings.window_s)
        for idx in [i for i in self.windows if i < oldest_ok]:
            del self.windows[idx]
        return [s for i in sorted(self.windows) for s in self.windows[i]]


class ClockModel:
    """
    Clock model of one (board, boot): feed exchanges with `add`, read the line with `fit`.

    Example::

        model = ClockModel()
        for s in store_samples:
            model.add(s.t1, s.t2, s.t3, s.t4)
        fit = model.fit()                     # None until the first exchange
        t_collector = model.to_collector_time(t_board_ms)
    """

    def __init__(self, settings: ClockSettings | None = None) -> None:
        self.settings = settings or ClockSettings()
        self._segments: list[_Segment] = []
        self._steps: list[ClockStep] = []
        self._pending: list[_Sample] = []
        self._fit_with_steps: tuple[ClockFit, int, ClockFit] | None = None
        self.n_exchanges = 0
        """Exchanges passed to `add` and accepted as valid input."""
        self.n_ignored = 0
        """Valid exchanges not used: delay above ``max_delay_s`` or discarded step candidates."""
        self.n_refused = 0
        """Exchanges refused as implausible before `add` (counted by the caller with `refuse`)."""

    @property
    def steps(self) -> tuple[ClockStep, ...]:
        """Confirmed steps, oldest first."""
        return tuple(self._steps)

    def add(self, t1: float, t2: float, t3: float, t4: float) -> ClockStep | None:
        """
        Take one exchange (units as in `exchange`).

        Returns:
            The `ClockStep` this exchange confirmed, else None.

        Raises:
            ValueError: a timestamp is not a finite number, T4 precedes T1, or T3 precedes T2
                (the message names the field).
        """
        values = {"t1": t1, "t2": t2, "t3": t3, "t4": t4}
        for name, value in values.items():
            if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
                raise ValueError(f"clock exchange: {name} must be a finite number, got {value!r}")
        if t4 < t1:
            raise ValueError(f"clock exchange: t4 ({t4!r}) is before t1 ({t1!r})")
        if t3 < t2:
            raise ValueError(f"clock exchange: t3 ({t3!r}) is before t2 ({t2!r})")
        t1, t2, t3, t4 = float(t1), float(t2), float(t3), float(t4)
        offset, delay = offset_delay(t1, t2, t3, t4)
        self.n_exchanges += 1
        if delay > self.settings.max_delay_s or delay < -self.settings.step_tolerance_s:
            # A negative round trip is impossible for consistent clocks: one of the four is wrong.
            self.n_ignored += 1
            return None
        s = _Sample(t1, t2, t3, t4, offset, max(delay, 0.0))
        if not self._segments:
            self._segments.append(_Segment(start_b=s.mid, theta_ref=offset))
            self._segments[-1].add(s, self.settings)
            return None
        seg = self._segments[-1]
        if self._consistent_with_segment(seg, s):
            if self._pending:
                self.n_ignored += len(self._pending)  # the candidates were outliers, not a step
                self._pending.clear()
            seg.add(s, self.settings)
            return None
        if self._pending and not self._consistent_pair(self._pending[0], s):
            self.n_ignored += len(self._pending)
            self._pending.clear()
        self._pending.append(s)
        if len(self._pending) < self.settings.step_confirm:
            return None
        first = self._pending[0]
        old_fit = self._fit_segment(seg)
        assert old_fit is not None  # a segment always holds at least one sample
        step = ClockStep(
            at_board_s=first.mid,
            at_collector_s=first.t2,
            size_s=float(first.offset - old_fit.offset_at(first.mid)),
        )
        self._steps.append(step)
        new = _Segment(start_b=first.mid, theta_ref=first.offset)
        for p in self._pending:
            new.add(p, self.settings)
        self._pending.clear()
        self._segments.append(new)
        return step

    def implausible(self, t1: float, t2: float, t3: float, t4: float) -> str | None:
        """
        Why an exchange cannot be a true one for this board, or None if it can.

        Refused: a negative round trip (beyond float rounding), and an offset off the current line by
        more than ``max_step_s`` plus δ/2. A refused exchange is neither a sample nor a step candidate:
        without this, a few agreeing forged exchanges would confirm a "step" and move every later
        reading of the boot.
        """
        offset, delay = offset_delay(t1, t2, t3, t4)
        if delay < -NEGATIVE_DELAY_SLACK_S:
            return f"round-trip delay {delay:.6f} s is negative"
        f = self.fit()
        if f is not None:
            miss = float(offset - f.offset_at((t1 + t4) / 2))
            if abs(miss) > self.settings.max_step_s + max(delay, 0.0) / 2:
                return f"offset is {miss:+.3f} s off the board's fitted line (bound {self.settings.max_step_s} s)"
        return None

    def refuse(self) -> None:
        """Count one exchange refused by the caller (`implausible`, or the collector's own clock)."""
        self.n_refused += 1

    def fit(self) -> ClockFit | None:
        """The current segment's line with every confirmed step, or None before the first exchange."""
        if not self._segments:
            return None
        f = self._fit_segment(self._segments[-1])
        if f is None:
            return None
        # Asked several times per request: the copy with the steps is made once per refit or new step.
        cached = self._fit_with_steps
        if cached is None or cached[0] is not f or cached[1] != len(self._steps):
            cached = self._fit_with_steps = (
                f,
                len(self._steps),
                dataclasses.replace(f, steps=tuple(self._steps)),
            )
        return cached[2]

    def to_collector_time(self, board_ms: np.ndarray) -> np.ndarray:
        """
        Board monotonic milliseconds → collector Unix seconds (vectorised).

        Each board time uses the line of the segment it falls in, so readings from before a step
        keep the mapping that was valid for them.

        Raises:
            LookupError: no exchange has been added yet.
        """
        if not self._segments:
            raise LookupError("clock model has no exchanges yet")
        b_ms = np.asarray(board_ms, dtype=np.float64)
        fits = [self._fit_segment(seg) for seg in self._segments]
        if len(fits) == 1:
            assert fits[0] is not None
            return fits[0].to_collector_time(b_ms)
        starts = np.array([seg.start_b for seg in self._segments[1:]]) * 1000.0
        which = np.searchsorted(starts, b_ms, side="right")
        out = np.empty(b_ms.shape, dtype=np.float64)
        for i, f in enumerate(fits):
            assert f is not None
            mask = which == i
            if np.any(mask):
                out[mask] = f.to_collector_time(b_ms[mask])
        return out

    # -- internals -------------------------------------------------------------------------------------

    def _consistent_with_segment(self, seg: _Segment, s: _Sample) -> bool:
        f = self._fit_segment(seg)
        assert f is not None
        predicted = float(f.offset_at(s.mid))
        # The line is only as sure as its best exchange: a segment resting on one slow exchange (say a
        # first heartbeat over a congested link) is off by up to that exchange's δ/2, and the fast
        # exchanges that follow must not be taken for a step.
        line_uncertainty = min(kept[0].delay for kept in seg.windows.values() if kept) / 2
        allowance = self.settings.step_tolerance_s + s.delay / 2 + line_uncertainty
        if not f.skew_estimated:
            allowance += self.settings.max_skew_ppm * 1e-6 * abs(s.mid - f.ref_board_s)
        return abs(s.offset - predicted) <= allowance

    def _consistent_pair(self, a: _Sample, b: _Sample) -> bool:
        allowance = (
            self.settings.step_tolerance_s
            + a.delay / 2
            + b.delay / 2
            + self.settings.max_skew_ppm * 1e-6 * abs(b.mid - a.mid)
        )
        return abs(b.offset - a.offset) <= allowance

    def _fit_segment(self, seg: _Segment) -> ClockFit | None:
        # Once the line rests on `_SETTLED_WINDOWS` windows of exchanges (up to `horizon_s`, thousands
        # kept), one more moves it by a fraction of a millisecond: refit once per window, not per exchange
        # (a refit over a full horizon costs milliseconds, and every request brings an exchange).
        f = seg.fit
        if f is not None and (
            not seg.dirty
            or (
                f.skew_estimated
                and f.span_s >= _SETTLED_WINDOWS * self.settings.window_s
                and seg.fit_window == seg.newest
            )
        ):
            return f
        kept = seg.kept(self.settings)
        if not kept:
            return None
        ref = seg.theta_ref
        mids = [s.mid for s in kept]
        span = max(mids) - min(mids)
        if not (
            span >= self.settings.min_skew_span_s
            and len({s.t1 for s in kept}) >= 2
            and len({s.t4 for s in kept}) >= 2
        ):
            # No skew yet: the clock filter's min-delay pick. A new boot stays here for its first
            # minutes and refits on every exchange, so these few samples skip numpy's per-array cost.
            best = min(kept, key=lambda s: s.delay)
            theta_at_ref = best.offset - ref
            sq = [((s.offset - ref) - theta_at_ref) ** 2 for s in kept]
            fit = ClockFit(
                offset_s=ref + theta_at_ref,
                ref_board_s=max(mids),
                skew_ppm=_skew_from_slope(0.0),
                residual_ms=math.sqrt(math.fsum(sq) / len(sq)) * 1000.0,
                n_samples=len(kept),
                span_s=span,
                skew_estimated=False,
                segment_start_board_s=seg.start_b,
            )
            seg.fit, seg.dirty, seg.fit_window = fit, False, seg.newest
            return fit
        t1 = np.array([s.t1 for s in kept])
        t4 = np.array([s.t4 for s in kept])
        mid = (t1 + t4) / 2
        # Relative ordinates: (T2 − ref) first keeps full precision.
        fwd = np.array([(s.t2 - ref) - s.t1 for s in kept])  # θ(T1) + out
        back = np.array([(s.t3 - ref) - s.t4 for s in kept])  # θ(T4) − back
        theta = np.array([s.offset - ref for s in kept])
        x_ref = float(mid.max())
        # Centre the abscissae so slopes and intercepts stay well conditioned after days of uptime.
        x0 = float(mid.mean())
        if self.settings.method is FitMethod.BAND:
            alpha, beta, _ = band_fit(t1 - x0, fwd, t4 - x0, back)
            theta_at_ref = alpha * (x_ref - x0) + beta
        else:
            a_f, b_f = lower_envelope(t1 - x0, fwd)
            a_b, b_b = lower_envelope(t4 - x0, -back)
            a_b, b_b = -a_b, -b_b
            alpha = (a_f + a_b) / 2
            theta_at_ref = ((a_f * (x_ref - x0) + b_f) + (a_b * (x_ref - x0) + b_b)) / 2
        resid = theta - (theta_at_ref + alpha * (mid - x_ref))
        fit = ClockFit(
            offset_s=ref + theta_at_ref,
            ref_board_s=x_ref,
            skew_ppm=_skew_from_slope(alpha),
            residual_ms=float(np.sqrt(np.mean(resid**2)) * 1000.0),
            n_samples=len(kept),
            span_s=span,
            skew_estimated=True,
            segment_start_board_s=seg.start_b,
        )
        seg.fit = fit
        seg.dirty = False
        seg.fit_window = seg.newest
        return fit


def clock_filter_pick(
    offsets: Sequence[float] | np.ndarray, delays: Sequence[float] | np.ndarray
) -> tuple[float, float]:
    """
    RFC 5905 §10 clock filter choice among recent samples: the ``(offset, delay)`` of minimum delay.

    Raises:
        ValueError: empty input or lengths differ.
    """
    o = np.asarray(offsets, dtype=np.float64)
    d = np.asarray(delays, dtype=np.float64)
    if o.shape != d.shape or o.size == 0:
        raise ValueError(
            f"offsets and delays must be non-empty and of equal length, got {o.shape} and {d.shape}"
        )
    i = int(np.argmin(d))
    return float(o[i]), float(d[i])


__all__ = [
    "ClockFit",
    "ClockModel",
    "ClockSettings",
    "ClockStep",
    "FitMethod",
    "band_fit",
    "clock_filter_pick",
    "lower_envelope",
    "wall_error_s",
]
