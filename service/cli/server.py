"""``inrush serve`` and ``inrush openapi``."""

from __future__ import annotations

import argparse
import contextlib
import json
import os
import sys
import tempfile
from collections.abc import Iterator
from pathlib import Path
from typing import TYPE_CHECKING

from . import EXIT_FAILURE, EXIT_OK

if TYPE_CHECKING:
    from ..db.session import Database


def register(subparsers: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    serve = subparsers.add_parser(
        "serve", help="run the HTTP service",
        description="Apply database migrations, then serve the API with uvicorn. Settings come "
                    "from INRUSH_* environment variables (INRUSH_DATABASE_URL, "
                    "INRUSH_ADMIN_TOKEN, INRUSH_PUBLIC_URL, INRUSH_MAX_BODY_BYTES, "
                    "INRUSH_MAX_ROWS).")
    serve.add_argument("--host", default="127.0.0.1", help="interface (default 127.0.0.1)")
    serve.add_argument("--port", type=int, default=8000, help="port (default 8000)")
    serve.add_argument("--workers", type=int, default=1, help="worker processes (default 1)")
    serve.add_argument("--log-level", default="info",
                       choices=["critical", "error", "warning", "info", "debug"])
    serve.set_defaults(handler=run_serve)

    openapi = subparsers.add_parser(
        "openapi", help="write the OpenAPI document of the API",
        description="Print the OpenAPI document, or write it to --output.")
    openapi.add_argument("--output", type=Path, help="file to write (default: stdout)")
    openapi.add_argument("--check", action="store_true",
                         help="exit 1 if --output differs from the app instead of writing it")
    openapi.set_defaults(handler=run_openapi)


def run_serve(args: argparse.Namespace) -> int:
    import uvicorn
    from pydantic import ValidationError
    from sqlalchemy.exc import SQLAlchemyError

    from ..db.session import Database
    from ..settings import Settings, settings_problems

    if args.workers < 1:
        print("inrush serve: --workers must be at least 1", file=sys.stderr)
        return EXIT_FAILURE
    try:
        settings = Settings()
    except ValidationError as error:
        print(f"inrush serve: invalid settings:\n{settings_problems(error)}", file=sys.stderr)
        return EXIT_FAILURE
    # Migrate once here so that several workers do not race at startup. With
    # INRUSH_MIGRATE_ON_START=0 (replicas; `inrush db upgrade` runs as its own step) only check
    # that the schema is the one this version needs.
    try:
        database = Database(settings.database_url,
                            connect_timeout_s=settings.database_connect_timeout_seconds)
    except (SQLAlchemyError, ImportError) as error:
        print(f"inrush serve: cannot use INRUSH_DATABASE_URL: {error}", file=sys.stderr)
        return EXIT_FAILURE
    try:
        if settings.migrate_on_start:
            database.migrate()
        else:
            problem = _schema_problem(database)
            if problem:
                print(f"inrush serve: {problem}", file=sys.stderr)
                return EXIT_FAILURE
    except (SQLAlchemyError, ImportError) as error:
        print(f"inrush serve: cannot prepare the database: {error}", file=sys.stderr)
        return EXIT_FAILURE
    finally:
        database.dispose()
    with _metrics_directory(args.workers):
        uvicorn.run("service.app:create_app", factory=True, host=args.host, port=args.port,
                    workers=args.workers, log_level=args.log_level, access_log=False,
                    log_config=_log_config(args.log_level))
    return EXIT_OK


def _schema_problem(database: Database) -> str | None:
    """Why the database's schema does not fit this version (``None`` when it is at head)."""
    from alembic.script import ScriptDirectory

    from ..db.session import alembic_config

    head = ScriptDirectory.from_config(alembic_config(database.url)).get_current_head()
    current = database.current_revision()
    if current == head:
        return None
    return (f"the database is at migration {current or '(none)'}, this version needs {head}; "
            "run `inrush db upgrade` first (INRUSH_MIGRATE_ON_START is off)")


@contextlib.contextmanager
def _metrics_directory(workers: int) -> Iterator[None]:
    """Several workers share request metrics through prometheus-client's multiprocess files:
    give them a fresh directory unless PROMETHEUS_MULTIPROC_DIR names one already."""
    if workers < 2 or os.environ.get("PROMETHEUS_MULTIPROC_DIR"):
        yield
        return
    with tempfile.TemporaryDirectory(prefix="inrush-metrics-") as directory:
        os.environ["PROMETHEUS_MULTIPROC_DIR"] = directory
        try:
            yield
        finally:
            os.environ.pop("PROMETHEUS_MULTIPROC_DIR", None)


def _log_config(level: str) -> dict[str, object]:
    """Uvicorn's logging setup plus the service's own loggers as JSON lines: ``inrush`` on
    stderr, the access log ``inrush.access`` on stdout. Uvicorn's own access log is off: it
    would repeat each request as text, query string (``?token=``) included."""
    import copy

    from uvicorn.config import LOGGING_CONFIG

    config = copy.deepcopy(LOGGING_CONFIG)
    config["formatters"]["json"] = {"()": "service.access_log.JsonFormatter"}
    config["handlers"]["json_stderr"] = {"formatter": "json", "class": "logging.StreamHandler",
                                         "stream": "ext://sys.stderr"}
    config["handlers"]["json_stdout"] = {"formatter": "json", "class": "logging.StreamHandler",
                                         "stream": "ext://sys.stdout"}
    config["loggers"]["inrush"] = {"handlers": ["json_stderr"], "level": level.upper(),
                                   "propagate": False}
    config["loggers"]["inrush.access"] = {"handlers": ["json_stdout"], "level": level.upper(),
                                          "propagate": False}
    config["loggers"]["uvicorn.access"] = {"handlers": [], "level": "WARNING",
                                           "propagate": False}
    return config


def openapi_text() -> str:
    from ..app import create_app
    from ..settings import Settings

    # The document does not depend on settings; fixed ones keep it reproducible.
    app = create_app(Settings(database_url="sqlite://", admin_token=None, public_url=None,
                              migrate_on_start=False))
    return json.dumps(app.openapi(), indent=2, sort_keys=True) + "\n"


def run_openapi(args: argparse.Namespace) -> int:
    text = openapi_text()
    if args.output is None:
        sys.stdout.write(text)
        return EXIT_OK
    if args.check:
        current = args.output.read_text(encoding="utf-8") if args.output.exists() else ""
        if current != text:
            print(f"inrush openapi: {args.output} is out of date; run `make openapi`",
                  file=sys.stderr)
            return EXIT_FAILURE
        return EXIT_OK
    args.output.parent.mkdir(parents=True, exist_ok=True)
    args.output.write_text(text, encoding="utf-8")
    print(f"wrote {args.output}")
    return EXIT_OK
