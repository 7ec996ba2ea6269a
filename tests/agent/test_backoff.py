"""Retry delays: the capped exponential ceiling and the two jitters under it."""

from __future__ import annotations

import random

import pytest

from listenpost.core.backoff import capped_exponential, full_jitter, half_jitter


@pytest.mark.parametrize(
    ("attempt", "expected"), [(0, 1.0), (1, 2.0), (4, 16.0), (5, 32.0), (6, 60.0), (500, 60.0)]
)
def test_capped_exponential_doubles_up_to_the_cap(attempt: int, expected: float) -> None:
    """initial·2^attempt until it meets the cap (huge attempt counts stay finite)."""
    assert expected == capped_exponential(attempt, 1.0, 60.0)


def test_full_jitter_is_bounded_by_the_capped_exponential() -> None:
    """Full jitter draws from the whole range [0, ceiling]."""
    rng = random.Random(3)
    for attempt in range(40):
        ceiling = min(60.0, 1.0 * 2**attempt)
        samples = [full_jitter(attempt, 1.0, 60.0, rng) for _ in range(200)]
        assert all(0.0 <= s <= ceiling for s in samples)
        assert max(samples) > 0.5 * ceiling  # spread over the whole range, not clustered at 0


def test_half_jitter_stays_in_the_upper_half() -> None:
    """Half jitter never waits less than half the ceiling, and does spread below it."""
    rng = random.Random(5)
    for attempt in range(10):
        ceiling = min(8.0, 2**attempt)
        samples = [half_jitter(attempt, 1.0, 8.0, rng) for _ in range(200)]
        assert all(0.5 * ceiling <= s <= ceiling for s in samples)
        assert min(samples) < 0.6 * ceiling and max(samples) > 0.9 * ceiling
