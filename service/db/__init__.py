"""Persistence: SQLAlchemy models and engine/session handling."""

from __future__ import annotations

import importlib
import pkgutil

from sqlalchemy import MetaData


def load_models() -> MetaData:
    """Import every ``*models`` module of this package; the metadata holding all their tables.

    Alembic's autogenerate and the schema checks need every table registered, including those
    of modules the running code has not imported yet.
    """
    for module in pkgutil.iter_modules(__path__):
        if module.name.endswith("models"):
            importlib.import_module(f"{__name__}.{module.name}")
    from .models import Base

    return Base.metadata
