"""Liveness: phi accrual numerics, the per-board rules and their precedence, the change tracker."""

from __future__ import annotations

import asyncio
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import norm

from listenpost.collector.models.clock import ClockFit, ClockModel, ClockStep
from listenpost.collector.models.liveness import (
    BoardInputs,
    BoardState,
    HeartbeatSample,
    LivenessSettings,
    LivenessTracker,
    StateChange,
    contact_stats,
    evaluate,
    log_sf,
    phi,
)
from listenpost.core.clock import VirtualClock

T0 = 1_800_000_000.0


def scipy_phi(delta, mu, sigma):
    """Reference: −log10 of the normal survival function via scipy.stats.norm.logsf (docs/references.md §6)."""
    return -norm.logsf(delta, loc=mu, scale=sigma) / math.log(10)


# -- phi numerics ------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("delta", "expected", "tol"),
    [
        (1.0, 0.301030, 1e-6),  # at the mean: −log10(0.5)
        (1.3, 2.869699, 1e-6),
        (2.0, 23.118053, 1e-5),  # the naive 1 − cdf form already loses digits here
        (5.0, 349.437006, 1e-4),  # z = 40: the survival function (~1e-350) is below the double range
    ],
)
def test_phi_matches_reference_values(delta, expected, tol):
    """φ(Δ, μ=1.0, σ=0.1) against docs/references.md §6 values computed with scipy.stats.norm.logsf."""
    # Hayashibara et al., SRDS 2004: φ(Δ) = −log10(1 − F(Δ)); values [RUN] in docs/references.md §6.
    assert abs(phi(delta, 1.0, 0.1) - expected) < tol
    assert abs(phi(delta, 1.0, 0.1) - scipy_phi(delta, 1.0, 0.1)) < tol


def test_phi_threshold_eight_at_5_612_sigma():
    """Φ = 8 is reached at Δ = μ + 5.612 σ (docs/references.md §6: norm.isf(1e-8) = 5.6120)."""
    assert abs(phi(10.0 + norm.isf(1e-8) * 2.0, 10.0, 2.0) - 8.0) < 1e-9


@settings(max_examples=300, deadline=None)
@given(z=st.floats(min_value=-35.0, max_value=300.0, allow_nan=False))
def test_log_sf_agrees_with_scipy_everywhere(z):
    """ln(1 − Φ(z)) equals scipy.stats.norm.logsf(z) to 1e-9 relative, across the erfc/asymptotic switch."""
    want = norm.logsf(z)
    got = log_sf(z)
    assert math.isfinite(got)
    assert abs(got - want) <= 1e-9 * max(1.0, abs(want))


@settings(max_examples=200, deadline=None)
@given(delta=st.floats(0.0, 600.0), mu=st.floats(0.5, 60.0), sigma=st.floats(0.05, 20.0))
def test_phi_agrees_with_scipy_for_heartbeat_like_inputs(delta, mu, sigma):
    """φ for heartbeat-scale inputs agrees with the scipy reference (hypothesis-generated)."""
    want = scipy_phi(delta, mu, sigma)
    assert abs(phi(delta, mu, sigma) - want) <= 1e-9 * max(1.0, abs(want))


@settings(max_examples=100, deadline=None)
@given(a=st.floats(0.0, 300.0), b=st.floats(0.0, 300.0))
def test_phi_never_falls_as_time_passes(a, b):
    lo, hi = sorted((a, b))
    assert phi(lo, 10.0, 2.0) <= phi(hi, 10.0, 2.0)


def test_phi_rejects_bad_sigma():
    with pytest.raises(ValueError, match="sigma"):
        phi(1.0, 1.0, 0.0)


def test_contacts_close_together_count_once():
    """A batch 50 ms behind a heartbeat does not halve the mean interval."""
    s = LivenessSettings()
    contacts = []
    for k in range(20):
        contacts += [T0 + 10.0 * k, T0 + 10.0 * k + 0.05]
    stats = contact_stats(contacts, s)
    assert stats.mu_s == pytest.approx(10.0) and stats.sigma_s == pytest.approx(0.0, abs=1e-9)
    assert stats.intervals == 19


# -- silent within a minute, no flapping: on virtual time ---------------------------------------------------


async def run_board(
    clock: VirtualClock,
    contacts: list[float],
    rng: np.random.Generator,
    *,
    jitter_s: float,
    loss: float,
    stop_at: float,
    batches: bool = True,
) -> None:
    """A board that sends a heartbeat every 10 s (and a batch every 5 s), each delayed up to ``jitter_s``."""

    async def sender(period: float, phase: float) -> None:
        await clock.sleep(phase)
        while clock.time() < stop_at:
            due = clock.time()
            if rng.random() >= loss:
                delay = rng.uniform(0.0, jitter_s)
                loop = asyncio.get_running_loop()
                # The request lands after its network delay; record the arrival at that moment.
                loop.create_task(arrive(due, delay))
            await clock.sleep(period)

    async def arrive(due: float, delay: float) -> None:
        await clock.sleep(delay)
        if due < stop_at:
            contacts.append(clock.time())

    await asyncio.gather(sender(10.0, 0.0), *([sender(5.0, 2.5)] if batches else []))


async def watch(
    clock: VirtualClock,
    tracker: LivenessTracker,
    contacts: list[float],
    changes: list[StateChange],
    period: float,
    phis: list[float] | None = None,
) -> None:
    """The collector's liveness task: evaluate every ``period`` seconds (contacts arrive in time order)."""
    while True:
        await clock.sleep(period)
        if not contacts:
            continue  # the board has not been heard yet: nothing to judge
        c = tracker.update(BoardInputs("g1-a", contacts=contacts[-200:]), clock.time())
        if c is not None:
            changes.append(c)
        if phis is not None:
            phis.append(tracker.verdict("g1-a").phi)


@pytest.mark.parametrize("seed", range(4))
async def test_dead_board_is_silent_within_60_s_of_last_contact(seed, capsys):
    """After 30 min of jittered contact the board dies; it turns silent within 60 s, and not before 30 s."""
    clock = VirtualClock(start=0.0, wall=T0)
    rng = np.random.default_rng(seed)
    contacts: list[float] = []
    changes: list[StateChange] = []
    tracker = LivenessTracker()
    dies_at = T0 + 1800.0 + rng.uniform(0, 10)
    board = asyncio.create_task(run_board(clock, contacts, rng, jitter_s=3.0, loss=0.02, stop_at=dies_at))
    watcher = asyncio.create_task(watch(clock, tracker, contacts, changes, period=5.0))
    await clock.advance(1800.0 + 200.0)
    board.cancel()
    watcher.cancel()
    await asyncio.gather(board, watcher, return_exceptions=True)
    last = max(contacts)
    silent = [c for c in changes if c.new is BoardState.SILENT]
    assert len(silent) == 1
    with capsys.disabled():
        print(
            f"\n  seed {seed}: silent {silent[0].at - last:.1f} s after the last contact ({silent[0].reason})"
        )
    assert LivenessSettings().min_silent_s <= silent[0].at - last <= 60.0
    # Before the death: live all along (the only earlier change is the first evaluation).
    assert [c.new for c in changes if c.at <= last] == [BoardState.LIVE]


@pytest.mark.parametrize(
    ("batches", "loss"), [(True, 0.03), (False, 0.02)], ids=["batches", "heartbeats-only"]
)
@pytest.mark.parametrize("seed", range(3))
async def test_healthy_board_on_loaded_network_does_not_flap(seed, batches, loss, capsys):
    """Two hours of contacts delayed up to 5 s with some lost: the board stays live, no state changes."""
    clock = VirtualClock(start=0.0, wall=T0)
    rng = np.random.default_rng(100 + seed)
    contacts: list[float] = []
    changes: list[StateChange] = []
    tracker = LivenessTracker()
    board = asyncio.create_task(
        run_board(clock, contacts, rng, jitter_s=5.0, loss=loss, stop_at=T0 + 1e9, batches=batches)
    )
    phis: list[float] = []
    watcher = asyncio.create_task(watch(clock, tracker, contacts, changes, period=2.0, phis=phis))
    await clock.advance(7200.0)
    board.cancel()
    watcher.cancel()
    await asyncio.gather(board, watcher, return_exceptions=True)
    gaps = np.diff(sorted(contacts))
    with capsys.disabled():
        print(
            f"\n  seed {seed}: {len(contacts)} contacts, longest gap {gaps.max():.1f} s, "
            f"max phi {max(phis):.2f} (late at {LivenessSettings().late_phi})"
        )
    assert [(c.old, c.new) for c in changes] == [(None, BoardState.LIVE)]


# -- the other rules -------------------------------------------------------------------------------------


def contacts_until(now: float, every: float = 10.0, n: int = 60) -> list[float]:
    return [now - every * k for k in range(n)][::-1]


def heartbeats(now: float, adverts: list[int], spool: list[int] | None = None, every: float = 10.0):
    n = len(adverts)
    spool = spool or [0] * n
    return [
        HeartbeatSample(at=now - every * (n - 1 - i), adverts_seen=a, spool_batches=q)
        for i, (a, q) in enumerate(zip(adverts, spool, strict=True))
    ]


def healthy_fit(**kw) -> ClockFit:
    base = dict(
        offset_s=T0,
        ref_board_s=5000.0,
        skew_ppm=12.0,
        residual_ms=3.0,
        n_samples=60,
        span_s=1800.0,
        skew_estimated=True,
        segment_start_board_s=100.0,
        steps=(),
    )
    base.update(kw)
    return ClockFit(**base)


def test_no_contact_yet_is_silent():
    v = evaluate(BoardInputs("u5-a"), T0)
    assert v.state is BoardState.SILENT and "no contact" in v.reason


def test_deaf_when_counter_flat_while_others_hear_tags():
    """The advert counter is flat for 130 s of heartbeats while others stored readings: deaf."""
    now = T0
    flat = heartbeats(now, [500, 900, 1300] + [1300] * 14)
    v = evaluate(BoardInputs("g2-a", contacts_until(now), flat, others_readings=400), now)
    assert v.state is BoardState.DEAF, v
    assert "no advertisements" in v.reason


def test_not_deaf_when_the_venue_is_quiet_or_window_not_covered():
    now = T0
    flat = heartbeats(now, [1300] * 17)
    assert (
        evaluate(BoardInputs("g2-a", contacts_until(now), flat, others_readings=0), now).state
        is BoardState.LIVE
    )
    short = heartbeats(now, [1300] * 4)  # 30 s of flat counter < deaf_window_s (40 s)
    assert (
        evaluate(BoardInputs("g2-a", contacts_until(now), short, others_readings=400), now).state
        is BoardState.LIVE
    )
    # The agent restarted 20 s ago (counter went back to 0): the flat stretch is too short to judge.
    restarted = heartbeats(now, [100 * i for i in range(14)] + [0] * 3)
    assert (
        evaluate(BoardInputs("g2-a", contacts_until(now), restarted, others_readings=400), now).state
        is BoardState.LIVE
    )


def test_drifting_on_skew_step_or_residual():
    now = T0
    c = contacts_until(now)
    assert (
        evaluate(BoardInputs("u2-a", c, clock=healthy_fit(skew_ppm=85.0)), now).state is BoardState.DRIFTING
    )
    assert evaluate(BoardInputs("u2-a", c, clock=healthy_fit(skew_ppm=-49.0)), now).state is BoardState.LIVE
    # A short fit is not trusted for skew yet.
    young = healthy_fit(skew_ppm=85.0, span_s=200.0)
    assert evaluate(BoardInputs("u2-a", c, clock=young), now).state is BoardState.LIVE
    noisy = healthy_fit(residual_ms=80.0)
    assert evaluate(BoardInputs("g1-a", c, clock=noisy), now).state is BoardState.DRIFTING
    step = ClockStep(at_board_s=4000.0, at_collector_s=now - 600.0, size_s=2.0)
    v = evaluate(BoardInputs("g1-a", c, clock=healthy_fit(steps=(step,))), now)
    assert v.state is BoardState.DRIFTING and "+2.000 s" in v.reason
    later = now + LivenessSettings().step_recent_s
    assert (
        evaluate(BoardInputs("g1-a", contacts_until(later), clock=healthy_fit(steps=(step,))), later).state
        is BoardState.LIVE
    )


def test_real_clock_model_of_a_plus_85_ppm_board_is_drifting():
    """A fit from exchanges of a board 85 ppm fast (docs/demo-venue.md u2-a) trips the skew rule."""
    model = ClockModel()
    s = 85e-6
    for k in range(60):
        t1 = 100.0 + 10.0 * k
        t2 = T0 + t1 / (1 + s) + 0.004
        t3 = t2 + 0.001
        model.add(t1, t2, t3, (t3 + 0.004 - T0) * (1 + s))
    now = T0 + 700.0
    v = evaluate(BoardInputs("u2-a", contacts_until(now), clock=model.fit()), now)
    assert v.state is BoardState.DRIFTING and "+85.0 ppm" in v.reason


def test_backlogged_only_when_spool_grows_steadily():
    now = T0
    adv = [100 * i for i in range(12)]
    growing = heartbeats(now, adv, [3 * i for i in range(12)])
    v = evaluate(BoardInputs("g3-b", contacts_until(now), growing), now)
    assert v.state is BoardState.BACKLOGGED and "grew by" in v.reason
    sawtooth = heartbeats(now, adv, [0, 4, 8, 2, 6, 10, 1, 5, 9, 0, 4, 8])
    assert evaluate(BoardInputs("g3-b", contacts_until(now), sawtooth), now).state is BoardState.LIVE
    high_but_draining = heartbeats(now, adv, [300 - 5 * i for i in range(12)])
    assert evaluate(BoardInputs("g3-b", contacts_until(now), high_but_draining), now).state is BoardState.LIVE


def test_precedence_retired_silent_deaf_drifting_backlogged_late_live():
    """retired > silent > deaf > drifting > backlogged > late > live, one rule removed at a time."""
    now = T0
    hb = heartbeats(now - 20.0, [1300] * 30, [3 * i for i in range(30)])
    drift = healthy_fit(skew_ppm=120.0)
    late_contacts = contacts_until(now - 26.0)  # 26 s overdue on 10 s contacts: late, not silent
    dead_contacts = contacts_until(now - 50.0)
    full = BoardInputs("g0-a", dead_contacts, hb, drift, retired=True, others_readings=500)
    order = []
    for inputs in [
        full,
        BoardInputs("g0-a", dead_contacts, hb, drift, others_readings=500),
        BoardInputs("g0-a", late_contacts, hb, drift, others_readings=500),
        BoardInputs("g0-a", late_contacts, hb, drift, others_readings=0),
        BoardInputs("g0-a", late_contacts, hb, None, others_readings=0),
        BoardInputs("g0-a", late_contacts, (), None),
        BoardInputs("g0-a", contacts_until(now), (), None),
    ]:
        order.append(evaluate(inputs, now).state)
    assert order == [
        BoardState.RETIRED,
        BoardState.SILENT,
        BoardState.DEAF,
        BoardState.DRIFTING,
        BoardState.BACKLOGGED,
        BoardState.LATE,
        BoardState.LIVE,
    ]


def test_tracker_reports_changes_only_and_can_be_seeded():
    tracker = LivenessTracker(initial={"g0-b": BoardState.LIVE})
    now = T0
    assert tracker.update(BoardInputs("g0-b", contacts_until(now)), now) is None  # seeded: no news
    first = tracker.update(BoardInputs("g1-a", contacts_until(now)), now)
    assert first == StateChange("g1-a", None, BoardState.LIVE, now, first.reason)
    assert tracker.update(BoardInputs("g1-a", contacts_until(now)), now + 1) is None
    change = tracker.update(BoardInputs("g1-a", contacts_until(now)), now + 60)
    assert change is not None and (change.old, change.new) == (BoardState.LIVE, BoardState.SILENT)
    assert change.at == now + 60 and "limit 45 s" in change.reason
    assert tracker.state("g1-a") is BoardState.SILENT
    assert tracker.verdict("g1-a").since_contact_s == pytest.approx(60.0)
    tracker.forget("g1-a")
    assert tracker.state("g1-a") is None


@pytest.mark.parametrize(
    ("kwargs", "field"),
    [
        ({"silent_after_s": 0}, "silent_after_s"),
        ({"late_phi": 9.0}, "late_phi"),
        ({"min_silent_s": 100.0}, "min_silent_s"),
        ({"phi_window": 0}, "phi_window"),
        ({"backlog_rising_share": 1.5}, "backlog_rising_share"),
    ],
)
def test_settings_validation_names_the_field(kwargs, field):
    with pytest.raises(ValueError, match=field):
        LivenessSettings(**kwargs)
