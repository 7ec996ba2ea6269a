"""
Clock-fit accuracy over many seeds: skew and offset errors of both fit methods, and fit cost.

    python -m bench.clock_fit [--seeds 200] [--minutes 30] [--skew 85]

Synthetic board: 10 s heartbeats with up to 1 s of scheduling jitter; out delay U(1, 50) ms, back delay
1 ms + Exp(12 ms) capped at 50 ms (asymmetric), collector hold 0.1–3 ms. Prints median, 95th percentile
and maximum absolute errors.

Then the clock work of one request of a board up for ``LONG_HOURS`` (the full 6 h horizon, an exchange
every ``REQUEST_S`` as an agent's batches and heartbeats bring them): the implausibility check, the
exchange, and 250 readings mapped, with the line refitted once per window (the model as it is) against
refitted on every exchange (its segment's line dropped before each request, as the model did before).
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from bench import _repeat
from listenpost.collector.models.clock import ClockModel, ClockSettings, FitMethod

BOOT_WALL = 1_800_000_123.456
LONG_HOURS = 7.0
REQUEST_S = 10 / 3
"""An agent's requests: a batch every 5 s and a heartbeat every 10 s, each with an exchange."""
TIMED_REQUESTS = 300


def exchanges(seed: int, skew_ppm: float, minutes: float, period_s: float = 10.0) -> tuple[np.ndarray, ...]:
    rng = np.random.default_rng(seed)
    s = skew_ppm * 1e-6
    n = int(minutes * 60 / period_s)
    b1 = 500.0 + np.arange(n) * period_s + rng.uniform(0.0, 1.0, n)
    out = rng.uniform(0.001, 0.050, n)
    back = np.minimum(0.001 + rng.exponential(0.012, n), 0.050)
    t2 = BOOT_WALL + b1 / (1 + s) + out
    t3 = t2 + rng.uniform(0.0001, 0.003, n)
    t4 = (t3 + back - BOOT_WALL) * (1 + s)
    return b1, t2, t3, t4


def main(argv: list[str] | None = None, quick: bool = False) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[1])
    p.add_argument("--seeds", type=int, default=200)
    p.add_argument("--minutes", type=float, default=30.0)
    p.add_argument("--skew", type=float, default=85.0, help="true skew, ppm (positive: board fast)")
    args = p.parse_args([] if quick and argv is None else argv)
    if quick:
        args.seeds, args.minutes = 5, 5.0
    s = args.skew * 1e-6
    for method in FitMethod:
        skew_err, off_err = [], []
        started = time.perf_counter()
        for seed in range(args.seeds):
            model = ClockModel(ClockSettings(method=method))
            for t1, t2, t3, t4 in zip(*exchanges(seed, args.skew, args.minutes), strict=True):
                model.add(float(t1), float(t2), float(t3), float(t4))
            fit = model.fit()
            assert fit is not None
            truth = BOOT_WALL + fit.ref_board_s / (1 + s) - fit.ref_board_s
            skew_err.append(abs(fit.skew_ppm - args.skew))
            off_err.append(abs(fit.offset_s - truth) * 1e3)
        elapsed = time.perf_counter() - started
        se, oe = np.array(skew_err), np.array(off_err)
        print(
            f"{method.value:8s} skew |err| ppm: median {np.median(se):.3f} p95 {np.percentile(se, 95):.3f} "
            f"max {se.max():.3f} | offset |err| ms: median {np.median(oe):.3f} p95 {np.percentile(oe, 95):.3f} "
            f"max {oe.max():.3f} | {elapsed / args.seeds * 1e3:.0f} ms per board"
        )
    long_boot(quick)
    return 0


def long_boot(quick: bool) -> None:
    """Seconds per request of clock work at a full horizon, refit per window vs per exchange."""
    b1, t2, t3, t4 = exchanges(1, 20.0, (1.0 if quick else LONG_HOURS) * 60, REQUEST_S)
    warm = len(b1) - TIMED_REQUESTS
    probe = np.arange(250, dtype=np.float64) * 20.0

    def side(every_exchange: bool) -> float:
        model = ClockModel()
        for x in zip(b1[:warm], t2[:warm], t3[:warm], t4[:warm], strict=True):
            model.add(*map(float, x))
        model.fit()
        started = time.perf_counter()
        for x in zip(b1[warm:], t2[warm:], t3[warm:], t4[warm:], strict=True):
            ex = tuple(map(float, x))
            model.implausible(*ex)
            model.add(*ex)
            if every_exchange:
                model._segments[-1].fit = None
            model.to_collector_time(probe + ex[0] * 1000.0)
        return (time.perf_counter() - started) / TIMED_REQUESTS

    got = _repeat.interleave(
        [("window", lambda: side(False)), ("exchange", lambda: side(True))], _repeat.repeats(3)
    )
    print(
        f"clock work per request, {LONG_HOURS if not quick else 1.0:g} h up: refit once per window "
        f"{_repeat.spread([v * 1e3 for v in got['window']], '.3f', ' ms')}, on every exchange "
        f"{_repeat.spread([v * 1e3 for v in got['exchange']], '.3f', ' ms')}"
    )
    _repeat.report(
        "clock_fit",
        "clock work per request at a 6 h horizon, refit per exchange / per window",
        [e / w for w, e in zip(got["window"], got["exchange"], strict=True)],
    )


if __name__ == "__main__":
    raise SystemExit(main())
