"""``inrush token ...`` and ``inrush db ...``: administration on the configured database."""

from __future__ import annotations

import argparse
import sys

from . import EXIT_BAD_INPUT, EXIT_FAILURE, EXIT_OK


def register(subparsers: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    token = subparsers.add_parser(
        "token", help="mint, list and revoke API tokens",
        description="Manage API tokens in the database named by INRUSH_DATABASE_URL.")
    token_commands = token.add_subparsers(dest="token_command", required=True, metavar="ACTION")
    create = token_commands.add_parser("create", help="mint a token (printed once)")
    create.add_argument("--scope", required=True, choices=["read", "write", "admin"])
    create.add_argument("--name", help="unique name recorded on alert actions "
                                       "(default: SCOPE-RANDOM)")
    create.set_defaults(handler=run_token_create)
    revoke = token_commands.add_parser("revoke", help="revoke a token by id or name")
    revoke.add_argument("ident", metavar="ID|NAME")
    revoke.set_defaults(handler=run_token_revoke)
    listing = token_commands.add_parser("list", help="list tokens (never their values)")
    listing.set_defaults(handler=run_token_list)

    db = subparsers.add_parser("db", help="database migrations",
                               description="Alembic migrations of INRUSH_DATABASE_URL.")
    db_commands = db.add_subparsers(dest="db_command", required=True, metavar="ACTION")
    upgrade = db_commands.add_parser("upgrade", help="apply migrations (default: to head)")
    upgrade.add_argument("revision", nargs="?", default="head")
    upgrade.set_defaults(handler=run_db_upgrade)
    current = db_commands.add_parser("current", help="print the applied revision")
    current.set_defaults(handler=run_db_current)


def _database():  # type: ignore[no-untyped-def]
    from ..db.session import Database
    from ..settings import Settings

    return Database(Settings().database_url)


def run_token_create(args: argparse.Namespace) -> int:
    from .. import tokens

    database = _database()
    try:
        database.migrate()
        with database.sessions.begin() as session:
            try:
                token, plain = tokens.create_token(session, tokens.Scope.parse(args.scope),
                                                   args.name)
            except tokens.TokenError as error:
                print(f"inrush token create: {error}", file=sys.stderr)
                return EXIT_BAD_INPUT
            token_id, name = token.id, token.name
    finally:
        database.dispose()
    print(plain)
    print(f"created token {token_id} {name!r} with scope {args.scope}; it is shown only once",
          file=sys.stderr)
    return EXIT_OK


def run_token_revoke(args: argparse.Namespace) -> int:
    from .. import tokens

    database = _database()
    try:
        database.migrate()
        with database.sessions.begin() as session:
            try:
                token = tokens.revoke_token(session, args.ident)
            except tokens.TokenError as error:
                print(f"inrush token revoke: {error}", file=sys.stderr)
                return EXIT_BAD_INPUT
            print(f"revoked token {token.id} {token.name!r}")
    finally:
        database.dispose()
    return EXIT_OK


def run_token_list(args: argparse.Namespace) -> int:
    from .. import tokens

    database = _database()
    try:
        database.migrate()
        with database.sessions() as session:
            rows = tokens.list_tokens(session)
            print(f"{'id':>4}  {'name':<32} {'scope':<6} {'created (UTC)':<20} revoked")
            for t in rows:
                revoked = t.revoked_at.strftime("%Y-%m-%d %H:%M:%S") if t.revoked_at else "-"
                print(f"{t.id:>4}  {t.name:<32} {t.scope:<6} "
                      f"{t.created_at.strftime('%Y-%m-%d %H:%M:%S'):<20} {revoked}")
    finally:
        database.dispose()
    return EXIT_OK


def run_db_upgrade(args: argparse.Namespace) -> int:
    from sqlalchemy.exc import SQLAlchemyError

    database = _database()
    try:
        database.migrate(args.revision)
        print(f"database at revision {database.current_revision()}")
    except SQLAlchemyError as error:
        print(f"inrush db upgrade: {error}", file=sys.stderr)
        return EXIT_FAILURE
    finally:
        database.dispose()
    return EXIT_OK


def run_db_current(args: argparse.Namespace) -> int:
    database = _database()
    try:
        print(database.current_revision() or "(empty database)")
    finally:
        database.dispose()
    return EXIT_OK
