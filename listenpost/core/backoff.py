"""
Retry delays: one capped exponential ceiling, two ways to jitter under it.

Every retry loop in the agent waits one of these on the injected clock; the callers bound the
number of attempts or tie the retries to a resource that is itself bounded (the spool).
"""

from __future__ import annotations

import random

# 2**62 times any sane initial delay is already past every cap; the bound keeps the float finite.
_MAX_DOUBLINGS = 62


def capped_exponential(attempt: int, initial_s: float, max_s: float) -> float:
    """
    The ceiling ``min(max_s, initial_s·2^attempt)``, seconds.

    Args:
        attempt: retries already made (0 for the first retry).
        initial_s: the ceiling for attempt 0, seconds.
        max_s: the cap, seconds.
    """
    return min(max_s, initial_s * float(2 ** min(max(attempt, 0), _MAX_DOUBLINGS)))


def full_jitter(attempt: int, initial_s: float, max_s: float, rng: random.Random) -> float:
    """
    Capped exponential backoff with full jitter: uniform in [0, min(max, initial·2^attempt)], seconds.

    Full jitter spreads a fleet that lost the collector at the same moment, so the boards do not
    return in lock-step (the AWS Architecture Blog's "Exponential Backoff and Jitter", common practice).
    """
    return rng.uniform(0.0, capped_exponential(attempt, initial_s, max_s))


def half_jitter(attempt: int, initial_s: float, max_s: float, rng: random.Random) -> float:
    """
    Capped exponential backoff jittered in [ceiling/2, ceiling], seconds.

    For restarting local hardware (one radio, not a fleet hitting one server): the wait never
    collapses towards zero, so a failing adapter is not hammered, yet two boards still drift apart.
    """
    return capped_exponential(attempt, initial_s, max_s) * rng.uniform(0.5, 1.0)
