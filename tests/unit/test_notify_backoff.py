"""Retry schedule: exponential nominal steps over hours, equal jitter within them."""

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


def test_equal_jitter_stays_within_half_and_all_of_the_nominal_step() -> None:
    rng = random.Random(7)
    for attempt in range(1, backoff.MAX_ATTEMPTS + 1):
        draws = [backoff.retry_delay(attempt, rng) for _ in range(400)]
        cap = backoff.nominal_delay(attempt)
        # Never sooner than half the step: a failed delivery is not retried a moment later.
        assert all(d is not None and cap / 2 <= d <= cap for d in draws)
        if cap > 0:
            # Uniform on [cap/2, cap]: the draws spread over that range (not constant).
            assert min(draws) < 0.55 * cap and max(draws) > 0.95 * cap  # type: ignore[operator]
            mean = sum(draws) / len(draws)  # type: ignore[arg-type]
            assert 0.7 * cap < mean < 0.8 * cap


def test_gives_up_after_the_last_attempt() -> None:
    rng = random.Random(1)
    now = dt.datetime(2026, 11, 9, 8, tzinfo=dt.UTC)
    assert backoff.next_attempt_at(now, backoff.MAX_ATTEMPTS, rng) is None
    later = backoff.next_attempt_at(now, 3, rng)
    assert later is not None and now + dt.timedelta(seconds=300) <= later <= now + dt.timedelta(
        seconds=600)
    with pytest.raises(ValueError):
        backoff.retry_delay(0, rng)


def test_same_seed_same_schedule() -> None:
    first = [backoff.retry_delay(n, random.Random(42)) for n in range(1, 10)]
    again = [backoff.retry_delay(n, random.Random(42)) for n in range(1, 10)]
    assert first == again
