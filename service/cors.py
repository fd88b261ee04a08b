"""Cross-origin access for browser dashboards: ``INRUSH_CORS_ORIGINS`` (comma-separated
origins such as ``https://dash.larkspur.example``; ``*`` for any). Unset: no CORS headers."""

from __future__ import annotations

from fastapi import FastAPI
from pydantic import Field
from pydantic_settings import BaseSettings, SettingsConfigDict
from starlette.middleware.cors import CORSMiddleware

ALLOWED_METHODS = ["GET", "HEAD", "POST", "PUT", "PATCH"]
ALLOWED_HEADERS = ["Authorization", "Content-Type", "Accept", "If-None-Match"]
# Headers a browser script may read: what pollers and paginators need.
EXPOSED_HEADERS = ["ETag", "Location", "X-Inrush-Diagnosis-Version", "X-Request-ID"]


class CorsSettings(BaseSettings):
    model_config = SettingsConfigDict(env_prefix="INRUSH_", extra="ignore")

    cors_origins: str = Field("", description="comma-separated origins allowed to call the API "
                                              "from a browser; * for any; empty for none")


def parse_origins(text: str) -> list[str]:
    return [o.strip().rstrip("/") for o in text.split(",") if o.strip()]


def add_cors(app: FastAPI, origins: str | None = None) -> list[str]:
    """Install Starlette's CORSMiddleware for ``origins`` (default ``INRUSH_CORS_ORIGINS``).

    Credentials (cookies) are not allowed cross-origin: browsers send the bearer token in the
    Authorization header. Returns the origins installed (empty: nothing installed).
    """
    allowed = parse_origins(CorsSettings().cors_origins if origins is None else origins)
    if allowed:
        app.add_middleware(CORSMiddleware, allow_origins=allowed, allow_methods=ALLOWED_METHODS,
                           allow_headers=ALLOWED_HEADERS, expose_headers=EXPOSED_HEADERS,
                           allow_credentials=False, max_age=600)
    return allowed
