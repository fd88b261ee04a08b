"""The demo's shipped unit-level Parquet logs are what ``service.demo.units`` generates."""

from __future__ import annotations

import duckdb

from service.demo import units


def test_shipped_logs_match_the_generator() -> None:
    exposures, routes = units.generate()
    connection = duckdb.connect()
    connection.execute("SET TimeZone = 'UTC'")
    for frame, path, time_column in ((exposures, units.EXPOSURES_PATH, "seen_at"),
                                     (routes, units.ROUTES_SAVED_PATH, "saved_at")):
        shipped = connection.execute(
            f"SELECT count(*), sum(user_id), min({time_column}), max({time_column}) "
            f"FROM read_parquet('{path}')").fetchone()
        assert shipped is not None
        assert shipped[0] == len(frame)
        assert shipped[1] == int(frame["user_id"].sum())
        assert shipped[2] == frame[time_column].min().to_pydatetime()
        assert shipped[3] == frame[time_column].max().to_pydatetime()
