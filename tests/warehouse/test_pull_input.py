"""Bad configs and bad data get a message naming the key or column; the CLI writes nothing
then, and a good pull writes the observation CSV the service reads."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import duckdb
import pandas as pd
import pytest

from detectors.data import validate_frame
from detectors.errors import InputError
from service.cli import EXIT_BAD_INPUT, EXIT_OK, main
from service.csvio import read_observations_csv
from service.warehouse.config import parse_config
from service.warehouse.cube import sufficient_statistics
from service.warehouse.pull import cutoff_for, default_as_of, run_pull
from tests.warehouse.pulldata import AS_OF, CONFIG, reference_cube, unit_data, write_parquet

GOOD = {"url": "duckdb://", "exposures": 'files = "exposures/*.parquet"',
        "orders": 'files = "orders.parquet"'}


@pytest.fixture(scope="module")
def folder(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("pull-input")
    write_parquet(path, *unit_data())
    return path


def _fields(error: pytest.ExceptionInfo[InputError]) -> dict[str, str]:
    return {p.field: p.message for p in error.value.problems}


@pytest.mark.parametrize(("text", "field", "words"), [
    ("[exposures]\nunit = 'u'\narm = 'a'\ntime = 't'\n", "exposures", "exactly one of"),
    ("[exposures]\nfiles = 'x.parquet'\narm = 'a'\ntime = 't'\n", "exposures.unit", "required"),
    ("[exposures]\nfiles = 'x.parquet'\nunit = 'u'\narm = 'a'\ntime = 't'\ncolour = 1\n",
     "exposures.colour", "not a known key"),
    ("[exposures]\nfiles = 'x.parquet'\nunit = 'u; drop'\narm = 'a'\ntime = 't'\n",
     "exposures.unit", "not a plain name"),
    ("[exposures]\nfiles = 'x.parquet'\nunit = 'u'\narm = 'a'\ntime = 't'\n"
     "timezone = 'Mars/Olympus'\n", "exposures.timezone", "IANA"),
    ("[warehouse]\nurl = 'oracle://x'\n[exposures]\nfiles = 'x.parquet'\nunit = 'u'\n"
     "arm = 'a'\ntime = 't'\n", "warehouse.url", "duckdb://"),
    ("[exposures]\nfiles = 'x.parquet'\nunit = 'u'\narm = 'a'\ntime = 't'\n[[metrics]]\n"
     "name = 'm'\nfiles = 'y.parquet'\nunit = 'u'\ntime = 't'\nwindow_days = 0\n",
     "metrics[0].window_days", "greater than 0"),
    ("[exposures\n", "config", "not valid TOML"),
])
def test_config_errors_name_the_key(text: str, field: str, words: str) -> None:
    with pytest.raises(InputError) as error:
        parse_config(text)
    assert words in _fields(error)[field]


def _config(folder: Path, **changes: str) -> str:
    return CONFIG.format(**{**GOOD, **changes})


def test_missing_column_and_wrong_types_are_named(folder: Path) -> None:
    text = _config(folder).replace('time = "exposed_at"', 'time = "entry_source"') \
        .replace('value = "amount"', 'value = "price"')
    with pytest.raises(InputError) as error:
        run_pull(parse_config(text, base=folder), AS_OF)
    fields = _fields(error)
    assert "must be a timestamp" in fields["exposures.time"]
    assert "'price' is not in metrics[0]" in fields["metrics[0].value"]


def test_unit_types_must_match(tmp_path: Path, folder: Path) -> None:
    duckdb.execute(f"COPY (SELECT CAST(user_id AS VARCHAR) AS user_id, ordered_at, amount "
                   f"FROM read_parquet('{folder}/orders.parquet')) TO "
                   f"'{tmp_path}/orders.parquet' (FORMAT parquet)")
    (tmp_path / "exposures").symlink_to(folder / "exposures")
    with pytest.raises(InputError) as error:
        run_pull(parse_config(_config(tmp_path), base=tmp_path), AS_OF)
    assert "must compare equal" in _fields(error)["metrics[0].unit"]


def test_no_files_and_unreachable_engine_name_the_key(folder: Path) -> None:
    text = _config(folder, exposures='files = "nowhere/*.parquet"')
    with pytest.raises(InputError) as error:
        run_pull(parse_config(text, base=folder), AS_OF)
    assert "exposures.files" in _fields(error)
    text = _config(folder, url="postgresql://nobody@127.0.0.1:1/none",
                   exposures='table = "exposures"', orders='table = "orders"')
    with pytest.raises(InputError) as error:
        run_pull(parse_config(text), AS_OF)
    assert "warehouse.url" in _fields(error)


def test_nothing_before_the_cutoff_is_an_empty_result(folder: Path) -> None:
    with pytest.raises(InputError) as error:
        run_pull(parse_config(_config(folder), base=folder), dt.date(2026, 1, 1))
    assert "no unit was exposed before the end of 2026-01-01" in _fields(error)["exposures"]


def test_cutoff_and_default_day_follow_the_zone() -> None:
    config = parse_config(_config(Path(".")))
    assert cutoff_for(config, AS_OF) == dt.datetime(2026, 3, 11, 7, tzinfo=dt.UTC)
    # 03:00 UTC on 2 March is still 1 March in Los Angeles: the last whole day is 28 Feb.
    assert default_as_of(config, dt.datetime(2026, 3, 2, 3, tzinfo=dt.UTC)) == \
        dt.date(2026, 2, 28)


def test_sum_of_squares_keeps_the_variance_of_large_values() -> None:
    # Values 1e9 + {0, 1, 2}: the exact sum of squares is 3e18 + 6e9 + 5. A float64 sum of
    # squares cannot hold the "+ 5"'s contribution to the variance (spacing 512 there), so the
    # M2 route must give sum_sq - sum^2/n = M2 = 2 to float64's precision of the total.
    values = [1e9, 1e9 + 1, 1e9 + 2]
    n, total = 3, sum(values)
    naive = sum(v * v for v in values)
    stats = sufficient_statistics(n, total, naive, 2 / 3, whole=0)
    exact = sum(int(v) ** 2 for v in values)
    assert stats["sum_sq"] == float(exact)
    # Whole numbers below 2**53: the engine's own sum is exact and used as is.
    assert sufficient_statistics(2, 3.0, 5.0, 0.25, whole=1) == {"n": 2, "sum": 3.0,
                                                                 "sum_sq": 5.0}


def test_cli_writes_the_observation_csv(folder: Path, tmp_path: Path,
                                        capsys: pytest.CaptureFixture[str]) -> None:
    config = tmp_path / "pull.toml"
    config.write_text(_config(folder).replace('"exposures/', f'"{folder}/exposures/')
                      .replace('"orders.parquet"', f'"{folder}/orders.parquet"'))
    output = tmp_path / "cube.csv"
    assert main(["pull", str(config), "--as-of", AS_OF.isoformat(), "--output",
                 str(output)]) == EXIT_OK
    said = capsys.readouterr().out
    assert "units" in said and "exposed to more than one arm" in said
    frame = read_observations_csv(output)
    clean, names = validate_frame(frame, ["control", "variant", "wide"])
    assert sorted(names) == ["spend_3d", "visits_2d"]
    reference = reference_cube(*unit_data())
    assert int(clean["entered"].sum()) == int(reference["entered"].sum())
    np_sum = pd.to_numeric(frame["spend_3d.sum"]).sum()
    assert np_sum == pytest.approx(reference["spend_3d.sum"].sum(), rel=1e-12)


def test_cli_bad_config_exits_2_naming_the_key(tmp_path: Path,
                                               capsys: pytest.CaptureFixture[str]) -> None:
    config = tmp_path / "pull.toml"
    config.write_text("[exposures]\nfiles = 'x.parquet'\narm = 'a'\ntime = 't'\n")
    output = tmp_path / "cube.csv"
    assert main(["pull", str(config), "--output", str(output)]) == EXIT_BAD_INPUT
    assert "exposures.unit: is required" in capsys.readouterr().err
    assert not output.exists()
    assert main(["pull", str(config), "--upload"]) == EXIT_BAD_INPUT
    assert "--experiment is required" in capsys.readouterr().err
