"""Refuse a webhook URL at registration when it may not be called (422 naming the field)."""

from __future__ import annotations

from ..problems import ProblemError
from .safety import Resolver, UnsafeTargetError, check_registration, system_resolver
from .settings import NotifySettings

FIELD = "notify.webhook_url"


def validate_webhook_url(url: str, settings: NotifySettings | None = None, *,
                         resolver: Resolver = system_resolver) -> None:
    """Raise a 422 problem when ``url`` is not an allowed webhook target."""
    settings = settings or NotifySettings()
    try:
        check_registration(url, allow_hosts=settings.allowed_hosts(), resolver=resolver)
    except UnsafeTargetError as error:
        raise ProblemError(422, f"The webhook URL cannot be used: {error}.", errors=[
            {"row": None, "field": FIELD, "message": str(error)}]) from None
