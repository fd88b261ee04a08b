"""Notification settings, read from ``INRUSH_*`` environment variables."""

from __future__ import annotations

from pydantic import Field
from pydantic_settings import BaseSettings, SettingsConfigDict


class NotifySettings(BaseSettings):
    """Webhook delivery settings; each field is ``INRUSH_<NAME>``."""

    model_config = SettingsConfigDict(env_prefix="INRUSH_", extra="ignore")

    public_url: str | None = Field(
        None, description="base URL of the service as its clients see it; links in webhook "
                          "payloads are absolute when set, paths otherwise")
    webhook_allow_hosts: str = Field(
        "", description="comma-separated hosts that webhooks may target even though they "
                        "resolve to private, loopback or link-local addresses (receivers on "
                        "the same network): HOST allows ports 80 and 443, HOST:PORT that "
                        "port, HOST:* any port; [ADDRESS] for IPv6 literals")
    notify_worker: bool = Field(
        True, description="run the delivery worker inside the service process (0 to disable, "
                          "e.g. in tests or when a separate process delivers)")
    notify_poll_seconds: float = Field(2.0, gt=0, le=300,
                                       description="how often the worker looks for due messages")
    webhook_timeout_seconds: float = Field(10.0, gt=0, le=120,
                                           description="total time allowed for one delivery")

    def allowed_hosts(self) -> frozenset[str]:
        return parse_hosts(self.webhook_allow_hosts)


def parse_hosts(text: str) -> frozenset[str]:
    """``"a.example, B.example:8080"`` -> ``{"a.example", "b.example:8080"}``: the entries,
    trimmed and in lower case (``service.notify.safety.host_allowed`` reads them)."""
    return frozenset(h.strip().lower() for h in text.split(",") if h.strip())
