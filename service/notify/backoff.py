"""Retry schedule of webhook deliveries: exponential steps over hours, with equal jitter.

The nominal wait before attempt ``n`` grows from 30 seconds to 8 hours; the actual wait is
drawn uniformly between half the nominal wait and all of it ("equal jitter", Brooker 2015,
"Exponential Backoff And Jitter", AWS Architecture Blog), so receivers that came back after an
outage are not hit by every queued message at once, and a failing receiver is never retried
at once (full jitter, from 0, could retry a failed message a moment later). The first attempt
is immediate. After the last attempt the message is failed. Pure functions: the random source
is passed in.

Example:
    >>> import random
    >>> nominal_delay(2)
    30.0
    >>> 60 <= retry_delay(3, random.Random(1)) <= 120
    True
    >>> retry_delay(MAX_ATTEMPTS + 1, random.Random(1)) is None
    True
"""

from __future__ import annotations

import datetime as dt
import random

# Nominal wait before attempt 1, 2, ... (seconds): 0, 30 s, 2 min, 10 min, 30 min, 1 h, 2 h,
# 4 h, 8 h -- about 16 hours of nominal retrying in total.
NOMINAL_DELAYS: tuple[float, ...] = (0.0, 30.0, 120.0, 600.0, 1800.0, 3600.0, 7200.0,
                                     14400.0, 28800.0)
MAX_ATTEMPTS = len(NOMINAL_DELAYS)


def nominal_delay(attempt: int, schedule: tuple[float, ...] = NOMINAL_DELAYS) -> float:
    """Upper bound of the wait before ``attempt`` (1-based)."""
    if not 1 <= attempt <= len(schedule):
        raise ValueError(f"attempt must be between 1 and {len(schedule)}")
    return float(schedule[attempt - 1])


def retry_delay(attempt: int, rng: random.Random,
                schedule: tuple[float, ...] = NOMINAL_DELAYS) -> float | None:
    """Seconds to wait before ``attempt`` (1-based), or ``None`` when no attempt is left."""
    if attempt < 1:
        raise ValueError("attempt numbers start at 1")
    if attempt > len(schedule):
        return None
    step = nominal_delay(attempt, schedule)
    return rng.uniform(step / 2.0, step)


def next_attempt_at(now: dt.datetime, attempts_made: int, rng: random.Random,
                    schedule: tuple[float, ...] = NOMINAL_DELAYS) -> dt.datetime | None:
    """When to try again after ``attempts_made`` failed attempts (``None``: give up)."""
    delay = retry_delay(attempts_made + 1, rng, schedule)
    return None if delay is None else now + dt.timedelta(seconds=delay)
