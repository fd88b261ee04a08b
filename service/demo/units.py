"""Unit-level logs of the demo scenario (invented), for ``inrush pull``: one tenth of the
Larkspur Trails traffic of :mod:`service.demo.scenario`, as the app would log it.

* ``larkspur_exposures.parquet``: ``user_id, arm, seen_at, entry_source`` (UTC). A user's
  first exposure falls on their day of entry (Mountain time); 40% come back once or twice,
  often through another source; a client caching bug shows 0.3% of users the other arm too.
  On the campaign days the newsletter brings dormant users, into ``cards`` only.
* ``larkspur_routes_saved.parquet``: ``user_id, saved_at``, one row per saved route, spread
  over the week after the user's first exposure (and a few saves before it, from an older
  session, which the pull must not count).

``python -m service.demo.units`` rewrites both files (seeded, reproducible);
``larkspur_pull.toml`` beside them is the pull config of the README.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import numpy as np
import pandas as pd

from .scenario import (
    _CAMPAIGN_SIZE,
    _DORMANT_MEAN,
    _LIFT,
    _SOURCES,
    ARMS,
    CAMPAIGN_DAYS,
    DAYS,
    START,
)

HERE = Path(__file__).parent
EXPOSURES_PATH = HERE / "larkspur_exposures.parquet"
ROUTES_SAVED_PATH = HERE / "larkspur_routes_saved.parquet"
CONFIG_PATH = HERE / "larkspur_pull.toml"
ZONE = "America/Denver"
SCALE = 0.1


def generate(seed: int = 20261026) -> tuple[pd.DataFrame, pd.DataFrame]:
    rng = np.random.default_rng(seed)
    weekday_factor = np.array([1.0, 0.95, 0.95, 1.0, 1.1, 1.35, 1.3])
    arm, source, day, mean = [], [], [], []
    for d in range(DAYS):
        date = START + dt.timedelta(days=d)
        for name, (base, unit_mean) in _SOURCES.items():
            count = rng.poisson(SCALE * base * (1 + 0.004 * d) * weekday_factor[date.weekday()])
            arms = rng.choice(ARMS, count)
            arm += list(arms)
            source += [name] * count
            day += [d] * count
            mean += list(np.where(arms == "cards", unit_mean * _LIFT, unit_mean))
            if name == "newsletter" and d in CAMPAIGN_DAYS:
                extra = int(SCALE * _CAMPAIGN_SIZE)
                arm += ["cards"] * extra
                source += [name] * extra
                day += [d] * extra
                mean += [_DORMANT_MEAN * _LIFT] * extra
    units = len(arm)
    user = rng.permutation(units) + 100_000
    local_midnight = pd.to_datetime([START + dt.timedelta(days=d) for d in day]) \
        .tz_localize(ZONE)
    first = local_midnight + pd.to_timedelta(rng.integers(6 * 3600, 23 * 3600, units), "s")
    frames = [pd.DataFrame({"user_id": user, "arm": arm, "seen_at": first,
                            "entry_source": source})]
    # Return visits, through whatever brought the user back (or no known source).
    again = rng.random(units) < 0.4
    for visit in (1, 2):
        who = np.flatnonzero(again & (rng.random(units) < (1.0 if visit == 1 else 0.4)))
        later = first[who] + pd.to_timedelta(rng.integers(3600, 6 * 86400, who.size), "s")
        sources = rng.choice(np.array([*_SOURCES, None], dtype=object), who.size)
        frames.append(pd.DataFrame({"user_id": user[who], "arm": np.asarray(arm)[who],
                                    "seen_at": later, "entry_source": sources}))
    crossed = np.flatnonzero(rng.random(units) < 0.003)
    other = np.where(np.asarray(arm)[crossed] == "cards", "control", "cards")
    frames.append(pd.DataFrame({"user_id": user[crossed], "arm": other,
                                "seen_at": first[crossed] + pd.Timedelta(minutes=30),
                                "entry_source": np.asarray(source)[crossed]}))
    exposures = pd.concat(frames, ignore_index=True).sort_values("seen_at", kind="stable")
    exposures["seen_at"] = exposures["seen_at"].dt.tz_convert("UTC")

    saves = rng.poisson(np.asarray(mean))
    owner = np.repeat(np.arange(units), saves)
    at = first[owner] + pd.to_timedelta(rng.integers(0, 7 * 86400, owner.size), "s")
    early = np.flatnonzero(rng.random(units) < 0.05)  # saved in an older session
    routes = pd.DataFrame({
        "user_id": np.concatenate([user[owner], user[early]]),
        "saved_at": np.concatenate([at, first[early] - pd.Timedelta(days=2)])})
    routes = routes.sort_values("saved_at", kind="stable")
    routes["saved_at"] = pd.to_datetime(routes["saved_at"], utc=True)
    return exposures.reset_index(drop=True), routes.reset_index(drop=True)


def write(exposures: pd.DataFrame, routes: pd.DataFrame) -> None:
    import duckdb

    connection = duckdb.connect()
    connection.execute("SET TimeZone = 'UTC'")
    for name, frame, path in (("exposures", exposures, EXPOSURES_PATH),
                              ("routes", routes, ROUTES_SAVED_PATH)):
        connection.register(name, frame)
        time_column = "seen_at" if name == "exposures" else "saved_at"
        columns = ", ".join(f"CAST({c} AS TIMESTAMPTZ) AS {c}" if c == time_column else c
                            for c in frame.columns)
        connection.execute(f"COPY (SELECT {columns} FROM {name}) TO '{path}' "
                           "(FORMAT parquet, COMPRESSION zstd)")
    connection.close()


def main() -> None:
    write(*generate())
    print(f"wrote {EXPOSURES_PATH} and {ROUTES_SAVED_PATH}")


if __name__ == "__main__":
    main()
