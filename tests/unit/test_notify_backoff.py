"""Retry schedule: exponential nominal steps over hours, full jitter within them."""

from __future__ import annotations

import datetime as dt
import itertools
import random

import pytest

from service.notify import backoff


def test_nominal_schedule_grows_over_hours() -> None:
    delays = [backoff.nominal_delay(n) for n in range(1, backoff.MAX_ATTEMPTS + 1)]
    assert delays[0] == 0
    assert all(b > a for a, b in itertools.pairwise(delays))
    assert delays[-1] >= 8 * 3600
    assert sum(delays) > 12 * 3600  # retries span more than half a day


def test_full_jitter_stays_within_zero_and_the_nominal_step() -> None:
    rng = random.Random(7)
    for attempt in range(1, backoff.MAX_ATTEMPTS + 1):
        draws = [backoff.retry_delay(attempt, rng) for _ in range(400)]
        cap = backoff.nominal_delay(attempt)
        assert all(d is not None and 0 <= d <= cap for d in draws)
        if cap > 0:
            # Uniform on [0, cap]: the draws spread over the whole step (not constant).
            assert min(draws) < 0.1 * cap and max(draws) > 0.9 * cap  # type: ignore[operator]
            mean = sum(draws) / len(draws)  # type: ignore[arg-type]
            assert 0.4 * cap < mean < 0.6 * cap


def test_gives_up_after_the_last_attempt() -> None:
    rng = random.Random(1)
    now = dt.datetime(2026, 11, 9, 8, tzinfo=dt.UTC)
    assert backoff.next_attempt_at(now, backoff.MAX_ATTEMPTS, rng) is None
    later = backoff.next_attempt_at(now, 3, rng)
    assert later is not None and now <= later <= now + dt.timedelta(seconds=600)
    with pytest.raises(ValueError):
        backoff.retry_delay(0, rng)


def test_same_seed_same_schedule() -> None:
    first = [backoff.retry_delay(n, random.Random(42)) for n in range(1, 10)]
    again = [backoff.retry_delay(n, random.Random(42)) for n in range(1, 10)]
    assert first == again
