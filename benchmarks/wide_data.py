"""Wide simulated experiments for the scale benchmark: days x 4 arms x sources x 3 metrics.

Cohorts are drawn independently (Poisson arrivals at the planned 25% shares, metric sums from a
gamma model of per-unit values), so the diagnosis finds nothing unusual and the cost measured
is the cost of the size alone. Invented data, for benchmarks only.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd

WIDE_ARMS = ("control", "cards", "map_first", "photo_grid")
WIDE_METRICS = ("routes_saved", "minutes_on_route", "photos_shared")
_FIRST_SOURCES = ("organic", "newsletter", "push", "trail_partner")


def source_names(count: int) -> list[str]:
    """``count`` entry-source names: four common ones, then numbered trailhead posters."""
    extra = [f"trailhead_poster_{i:03d}" for i in range(max(0, count - len(_FIRST_SOURCES)))]
    return [*_FIRST_SOURCES, *extra][:count]


def wide_frame(start: dt.date, days: int, sources: int, *, seed: int = 11,
               first_day: int = 0) -> pd.DataFrame:
    """Rows of days ``first_day .. first_day + days - 1`` as the CSV upload's flat columns.

    The draw of a day depends only on the seed and the day, so a day re-drawn later gives the
    same rows (a re-upload replaces rows with equal ones unless ``seed`` differs).
    """
    names = source_names(sources)
    frames = []
    for day in range(first_day, first_day + days):
        rng = np.random.default_rng([seed, day])
        cells = len(WIDE_ARMS) * sources
        weight = np.tile(np.linspace(3.0, 0.2, sources), len(WIDE_ARMS))
        entered = rng.poisson(40.0 * weight, cells) + 1
        frame = {
            "date": np.full(cells, (start + dt.timedelta(days=day)).isoformat()),
            "arm": np.repeat(WIDE_ARMS, sources),
            "source": np.tile(names, len(WIDE_ARMS)),
            "entered": entered,
        }
        for position, metric in enumerate(WIDE_METRICS):
            n = entered
            values = rng.gamma(2.0, 0.5 + 0.3 * position, (cells, 4))
            mean, spread = values[:, 0], values[:, 1]
            total = n * mean
            # sum_sq >= sum^2 / n holds with room: n * (mean^2 + spread^2).
            frame[f"{metric}.n"] = n
            frame[f"{metric}.sum"] = np.round(total, 3)
            frame[f"{metric}.sum_sq"] = np.round(n * (mean ** 2 + spread ** 2) + 1.0, 3)
        frames.append(pd.DataFrame(frame))
    return pd.concat(frames, ignore_index=True)


def wide_csv(start: dt.date, days: int, sources: int, *, seed: int = 11,
             first_day: int = 0) -> bytes:
    return wide_frame(start, days, sources, seed=seed,
                      first_day=first_day).to_csv(index=False).encode()
