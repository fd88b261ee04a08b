"""The ``inrush`` command line: offline analysis of a CSV file and running the service.

Each subcommand lives in its own module, which exposes ``register(subparsers)``.
"""

from __future__ import annotations

import argparse
import importlib
import sys
from collections.abc import Sequence

# Modules that contribute subcommands, in the order they appear in --help.
_COMMAND_MODULES = ("offline", "demo", "pull", "server", "admin", "maintenance")

EXIT_OK = 0
EXIT_FAILURE = 1
EXIT_BAD_INPUT = 2


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="inrush",
        description="Find the days and entry sources that broke an experiment's sample ratio.",
    )
    subparsers = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    for name in _COMMAND_MODULES:
        try:
            module = importlib.import_module(f"{__name__}.{name}")
        except ModuleNotFoundError as error:
            if error.name != f"{__name__}.{name}":
                raise
            continue
        module.register(subparsers)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    from pydantic import ValidationError

    try:
        return int(args.handler(args) or EXIT_OK)
    except ValidationError as error:  # INRUSH_* settings; the values are not repeated
        if error.title not in ("Settings", "NotifySettings"):
            raise
        from ..settings import settings_problems

        print(f"inrush: invalid settings:\n{settings_problems(error)}", file=sys.stderr)
        return EXIT_FAILURE


if __name__ == "__main__":
    sys.exit(main())
