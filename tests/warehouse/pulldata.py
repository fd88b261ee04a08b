"""Unit-level test data for the pull, with its edge cases, and an independent pandas
aggregation to compare every engine's cube with."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd

ZONE = "America/Los_Angeles"
AS_OF = dt.date(2026, 3, 10)
# The end of AS_OF in ZONE (PDT since 8 March: UTC-7).
CUTOFF = pd.Timestamp("2026-03-11 07:00", tz="UTC")
WINDOWS = {"spend_3d": 3, "visits_2d": 2}

CONFIG = """
[warehouse]
url = "{url}"

[exposures]
{exposures}
unit = "user_id"
arm = "arm"
time = "exposed_at"
source = "entry_source"
timezone = "America/Los_Angeles"

[[metrics]]
name = "spend_3d"
{orders}
unit = "user_id"
time = "ordered_at"
value = "amount"
window_days = 3

[[metrics]]
name = "visits_2d"
{orders}
unit = "user_id"
time = "ordered_at"
window_days = 2
"""


def _utc(text: str) -> pd.Timestamp:
    return pd.Timestamp(text, tz="UTC")


def unit_data(seed: int = 7) -> tuple[pd.DataFrame, pd.DataFrame]:
    """(exposures, orders). Random units plus hand-placed edge cases (ids >= 10_000)."""
    rng = np.random.default_rng(seed)
    units = 600
    first = _utc("2026-03-01 00:00") + pd.to_timedelta(
        rng.uniform(0, 11 * 86400, units), unit="s").round("us")
    arm = rng.choice(["control", "variant", "wide"], units, p=[0.45, 0.45, 0.10])
    sources = np.array(["organic", "email", "push", None], dtype=object)
    rows = []
    for u in range(units):
        repeats = 1 + rng.poisson(0.8)
        for r in range(repeats):
            when = first[u] + pd.Timedelta(seconds=float(rng.uniform(0, 3 * 86400))) * int(r > 0)
            rows.append((u, arm[u], when.round("us"), sources[rng.integers(4)]))
        if rng.random() < 0.03:  # crossed: a later exposure to another arm
            rows.append((u, "variant" if arm[u] == "control" else "control",
                         first[u] + pd.Timedelta(hours=5), "organic"))
    edge = [
        # Crossed at the very same instant.
        (10_000, "control", _utc("2026-03-05 12:00"), "email"),
        (10_000, "variant", _utc("2026-03-05 12:00"), "email"),
        # Tie at the first instant: 'push' wins over a missing source ('unattributed').
        (10_001, "control", _utc("2026-03-04 10:00"), None),
        (10_001, "control", _utc("2026-03-04 10:00"), "push"),
        (10_001, "control", _utc("2026-03-04 09:00:00.000001"), None),
        # 06:59 UTC on 11 March is still 10 March in Los Angeles: counted, dated 10 March.
        (10_002, "variant", _utc("2026-03-11 06:59:59"), "organic"),
        # 07:00 UTC on 11 March is the cutoff: not yet exposed as of 10 March.
        (10_003, "variant", _utc("2026-03-11 07:00"), "organic"),
        # 02:00 UTC on 3 March is 2 March in Los Angeles (UTC-8 before the clock change).
        (10_004, "control", _utc("2026-03-03 02:00"), "email"),
        # Window closes exactly at the cutoff (3 days): mature.
        (10_005, "control", _utc("2026-03-08 07:00"), "organic"),
        # Window closes one microsecond after the cutoff: not mature yet.
        (10_006, "control", _utc("2026-03-08 07:00:00.000001"), "organic"),
        # Only crossed units on this day and source.
        (10_007, "wide", _utc("2026-03-02 20:00"), "partner"),
        (10_007, "control", _utc("2026-03-02 21:00"), "partner"),
    ]
    exposures = pd.DataFrame(rows + edge, columns=["user_id", "arm", "exposed_at",
                                                   "entry_source"])
    exposures["user_id"] = exposures["user_id"].astype("int64")
    exposures["exposed_at"] = pd.to_datetime(exposures["exposed_at"], utc=True)

    events = []
    for u in rng.choice(units, 500):
        when = first[u] + pd.Timedelta(seconds=float(rng.uniform(-86400, 5 * 86400)))
        events.append((int(u), when.round("us"), float(np.round(rng.lognormal(3, 1), 2))))
    events += [
        (10_001, _utc("2026-03-04 09:00:00.000001"), 5.0),   # at the first exposure: in
        (10_001, _utc("2026-03-07 09:00:00.000001"), 7.0),   # at the window's end: out (3d)
        (10_001, _utc("2026-03-04 08:59"), 11.0),            # before exposure: out
        (10_005, _utc("2026-03-11 06:59:59.999999"), 1e9 + 0.5),  # large value, in
        (10_005, _utc("2026-03-09 00:00"), 1e9 + 0.25),
        (10_006, _utc("2026-03-09 00:00"), 3.0),             # immature unit: not counted
        (10_000, _utc("2026-03-05 13:00"), 4.0),             # crossed unit: not counted
    ]
    orders = pd.DataFrame(events, columns=["user_id", "ordered_at", "amount"])
    # Naive timestamps (read as UTC), as many logs store them.
    orders["ordered_at"] = pd.to_datetime(orders["ordered_at"], utc=True).dt.tz_localize(None)
    return exposures, orders


def write_parquet(folder: Path, exposures: pd.DataFrame, orders: pd.DataFrame) -> None:
    """Exposures split over two files (a glob reads both); orders in one."""
    (folder / "exposures").mkdir()
    connection = duckdb.connect()
    connection.execute("SET TimeZone = 'UTC'")
    half = len(exposures) // 2
    for index, part in enumerate((exposures.iloc[:half], exposures.iloc[half:])):
        connection.register("part", part)
        connection.execute(f"COPY part TO '{folder}/exposures/part-{index}.parquet' "
                           "(FORMAT parquet)")
    connection.register("orders", orders)
    # Microseconds, as logs store them (pandas' nanoseconds are a type Spark cannot read).
    connection.execute("COPY (SELECT user_id, CAST(ordered_at AS TIMESTAMP) AS ordered_at, "
                       f"amount FROM orders) TO '{folder}/orders.parquet' (FORMAT parquet)")
    connection.close()


def reference_cube(exposures: pd.DataFrame, orders: pd.DataFrame) -> pd.DataFrame:
    """The cube by plain pandas, following the documented semantics step by step."""
    e = exposures[exposures["exposed_at"] < CUTOFF].copy()
    e["entry_source"] = e["entry_source"].fillna("unattributed")
    arms = e.groupby("user_id")["arm"].nunique()
    first = (e.sort_values(["user_id", "exposed_at", "entry_source"])
             .groupby("user_id").head(1).set_index("user_id"))
    first = first[arms.reindex(first.index) == 1]
    first["date"] = first["exposed_at"].dt.tz_convert(ZONE).dt.strftime("%Y-%m-%d")
    table = first[["date", "arm", "entry_source"]].copy()
    o = orders.assign(ordered_at=orders["ordered_at"].dt.tz_localize("UTC"))
    for name, days in WINDOWS.items():
        window = pd.Timedelta(days=days)
        joined = o.merge(first[["exposed_at"]], left_on="user_id", right_index=True)
        inside = joined[(joined["ordered_at"] >= joined["exposed_at"])
                        & (joined["ordered_at"] < joined["exposed_at"] + window)]
        per_unit = (inside.groupby("user_id")["amount"].sum() if name == "spend_3d"
                    else inside.groupby("user_id").size().astype(float))
        value = per_unit.reindex(first.index, fill_value=0.0)
        mature = first["exposed_at"] + window <= CUTOFF
        table[name] = value.where(mature)
    grouped = table.groupby(["date", "arm", "entry_source"])
    cube = grouped.size().rename("entered").to_frame()
    for name in WINDOWS:
        cube[f"{name}.n"] = grouped[name].count()
        cube[f"{name}.sum"] = grouped[name].sum()
        cube[f"{name}.sum_sq"] = table[name].pow(2).groupby(
            [table["date"], table["arm"], table["entry_source"]]).sum()
    cube = cube.reset_index().rename(columns={"entry_source": "source"})
    return cube.sort_values(["date", "arm", "source"]).reset_index(drop=True)


def reference_crossed(exposures: pd.DataFrame) -> int:
    e = exposures[exposures["exposed_at"] < CUTOFF]
    return int((e.groupby("user_id")["arm"].nunique() > 1).sum())


def cube_frame(rows: list[dict[str, object]]) -> pd.DataFrame:
    """Pull rows in the reference's layout."""
    records = []
    for row in rows:
        record = {k: row[k] for k in ("date", "arm", "source", "entered")}
        for name, stats in row["metrics"].items():  # type: ignore[union-attr]
            for stat, value in stats.items():
                record[f"{name}.{stat}"] = value
        records.append(record)
    frame = pd.DataFrame(records)
    return frame.sort_values(["date", "arm", "source"]).reset_index(drop=True)


def assert_matches_reference(rows: list[dict[str, object]], reference: pd.DataFrame) -> None:
    got = cube_frame(rows)
    assert list(got.columns) == list(reference.columns)
    pd.testing.assert_frame_equal(got[["date", "arm", "source"]],
                                  reference[["date", "arm", "source"]])
    for column in got.columns[3:]:
        if column == "entered" or column.endswith(".n") or column.startswith("visits_2d"):
            # Counts, and sums of whole numbers: exact.
            assert got[column].astype(float).tolist() == reference[column].astype(float)\
                .tolist(), column
        else:
            np.testing.assert_allclose(got[column].astype(float), reference[column],
                                       rtol=1e-12, atol=0, err_msg=column)
