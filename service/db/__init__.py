"""Persistence: SQLAlchemy models and engine/session handling."""
