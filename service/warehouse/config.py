"""The pull configuration: a TOML file read by ``tomllib`` into pydantic models.

Every error names the key it concerns (``exposures.unit``, ``metrics[1].window_days``), so a
wrong config is fixed from the message alone.
"""

from __future__ import annotations

import re
import tomllib
import zoneinfo
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from detectors.data import METRIC_NAME
from detectors.errors import InputError, Problem

# A column or table name as the config gives it: plain identifiers (optionally schema.table),
# quoted for the engine by the query builder, so no SQL is ever spliced in from the config.
_IDENTIFIER = re.compile(r"^[A-Za-z_][A-Za-z0-9_$]{0,62}$")
_TABLE = re.compile(r"^[A-Za-z_][A-Za-z0-9_$]{0,62}(\.[A-Za-z_][A-Za-z0-9_$]{0,62}){0,2}$")

Column = Annotated[str, Field(pattern=_IDENTIFIER.pattern)]


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class Warehouse(_Strict):
    url: str = Field("duckdb://", description="duckdb://[PATH], postgresql://..., "
                                              "spark://local[*] or spark://HOST:PORT")

    @field_validator("url")
    @classmethod
    def _known_scheme(cls, url: str) -> str:
        scheme = url.partition("://")[0].lower().partition("+")[0]
        if "://" not in url or scheme not in ("duckdb", "postgresql", "postgres", "spark"):
            raise ValueError("must start with duckdb://, postgresql:// or spark://")
        return url

    @property
    def engine(self) -> Literal["duckdb", "postgres", "spark"]:
        scheme = self.url.partition("://")[0].lower().partition("+")[0]
        return "postgres" if scheme in ("postgresql", "postgres") else scheme  # type: ignore[return-value]


class _Relation(_Strict):
    """Where rows come from: a table of the warehouse, or files (DuckDB and Spark)."""

    files: str | None = Field(None, min_length=1)
    table: str | None = Field(None, pattern=_TABLE.pattern)

    @model_validator(mode="after")
    def _one_source(self) -> _Relation:
        if (self.files is None) == (self.table is None):
            raise ValueError("give exactly one of `files` or `table`")
        return self


class Exposures(_Relation):
    unit: Column
    arm: Column
    time: Column
    source: Column | None = None
    timezone: str = "UTC"

    @field_validator("timezone")
    @classmethod
    def _zone(cls, name: str) -> str:
        try:
            zoneinfo.ZoneInfo(name)
        except (zoneinfo.ZoneInfoNotFoundError, ValueError):
            raise ValueError(f"{name!r} is not an IANA time zone (e.g. UTC, Europe/Lisbon)"
                             ) from None
        return name


class Metric(_Relation):
    name: str = Field(pattern=METRIC_NAME.pattern)
    unit: Column
    time: Column
    value: Column | None = None  # omitted: the metric counts events
    window_days: int = Field(gt=0, le=3660)


class PullConfig(_Strict):
    warehouse: Warehouse = Warehouse()
    exposures: Exposures
    metrics: list[Metric] = Field(default_factory=list)

    @model_validator(mode="after")
    def _unique_names(self) -> PullConfig:
        names = [m.name for m in self.metrics]
        repeated = sorted({n for n in names if names.count(n) > 1})
        if repeated:
            raise ValueError(f"metric names must be unique; repeated: {', '.join(repeated)}")
        return self


def parse_config(text: str, *, base: Path | None = None) -> PullConfig:
    """The config in ``text`` (TOML). Relative ``files`` patterns are taken from ``base``.

    Raises :class:`InputError` with one problem per wrong key.
    """
    try:
        document = tomllib.loads(text)
    except tomllib.TOMLDecodeError as error:
        raise InputError([Problem("config", f"is not valid TOML: {error}")]) from None
    return config_from_dict(document, base=base)


def config_from_dict(document: dict[str, Any], *, base: Path | None = None) -> PullConfig:
    try:
        config = PullConfig.model_validate(document)
    except ValidationError as error:
        raise InputError([Problem(_key(item["loc"]), _message(item))
                          for item in error.errors(include_url=False)]) from None
    if base is None:
        return config
    return config.model_copy(update={
        "exposures": _rebased(config.exposures, base),
        "metrics": [_rebased(m, base) for m in config.metrics]})


def load_config(path: Path) -> PullConfig:
    if not path.is_file():
        raise InputError([Problem("config", f"no such file: {path}")])
    return parse_config(path.read_text(encoding="utf-8"), base=path.resolve().parent)


def _rebased(relation: Any, base: Path) -> Any:
    if relation.files is None or "://" in relation.files or Path(relation.files).is_absolute():
        return relation
    return relation.model_copy(update={"files": str(base / relation.files)})


def _key(location: tuple[int | str, ...]) -> str:
    key = ""
    for part in location:
        if isinstance(part, int):
            key += f"[{part}]"
        else:
            key += f".{part}" if key else part
    return key or "config"


def _message(item: Any) -> str:
    if item["type"] == "extra_forbidden":
        return "is not a known key"
    if item["type"] == "missing":
        return "is required"
    if item["type"] == "string_pattern_mismatch":
        return (f"{item['input']!r} is not a plain name (letters, digits, _; a table may be "
                "schema.table)")
    message = str(item["msg"])
    return message.removeprefix("Value error, ")
