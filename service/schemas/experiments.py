"""Experiment bodies."""

from __future__ import annotations

import datetime as dt
from typing import Annotated, Any

from pydantic import (
    AfterValidator,
    AnyHttpUrl,
    BaseModel,
    ConfigDict,
    Field,
    StringConstraints,
    UrlConstraints,
)

from ..notify.signing import SignatureError, secret_key

EXPERIMENT_ID_PATTERN = r"^[a-z0-9][a-z0-9._-]{0,63}$"
ExperimentId = Annotated[str, StringConstraints(pattern=EXPERIMENT_ID_PATTERN)]
ArmName = Annotated[str, StringConstraints(min_length=1, max_length=64, pattern=r"^\S(.*\S)?$")]
Title = Annotated[str, StringConstraints(min_length=1, max_length=200, strip_whitespace=True)]
MAX_URL_LENGTH = 2048  # the webhook_url column


def _storable_url(url: AnyHttpUrl) -> AnyHttpUrl:
    # Normalising can lengthen a URL (percent-encoding, punycode): check what is stored.
    if len(str(url)) > MAX_URL_LENGTH:
        raise ValueError(f"the URL is longer than {MAX_URL_LENGTH} characters once normalised")
    return url


WebhookUrl = Annotated[AnyHttpUrl, UrlConstraints(max_length=MAX_URL_LENGTH),
                       AfterValidator(_storable_url)]


def _signing_secret(secret: str) -> str:
    # A "whsec_" secret whose key is not base64 would make every delivery fail to sign.
    try:
        secret_key(secret)
    except SignatureError as error:
        raise ValueError(str(error)) from None
    return secret


WebhookSecret = Annotated[str, StringConstraints(min_length=8, max_length=256),
                          AfterValidator(_signing_secret)]


class AllocationStep(BaseModel):
    """Weights in force from ``from`` (inclusive) until the next step."""

    model_config = ConfigDict(populate_by_name=True, extra="forbid")

    from_: dt.date = Field(alias="from", description="first day these weights apply")
    weights: list[float] | dict[str, float] = Field(
        description="one positive weight per arm, in arm order or as {arm: weight}; sum 1")


class NotifyIn(BaseModel):
    """Where to send incident notifications; the secret signs them and is never returned."""

    model_config = ConfigDict(extra="forbid")

    webhook_url: WebhookUrl = Field(description="http(s) URL that receives alert webhooks")
    secret: WebhookSecret | None = Field(
        None, description="shared secret for signatures (omit on PATCH to keep the current one); "
                          "whsec_<base64 key> or any other text")


class NotifyOut(BaseModel):
    webhook_url: str
    has_secret: bool


class ExperimentCreate(BaseModel):
    model_config = ConfigDict(extra="forbid")

    id: ExperimentId = Field(description="[a-z0-9][a-z0-9._-]{0,63}")
    title: Title | None = Field(None, description="defaults to the id")
    start_date: dt.date
    arms: list[ArmName] = Field(min_length=2, max_length=26,
                                description="arm names; the first is the reference arm")
    allocation: list[AllocationStep] | None = Field(
        None, min_length=1, max_length=100,
        description="allocation schedule; default equal weights from start_date")
    notify: NotifyIn | None = None


class ExperimentPatch(BaseModel):
    """Fields present are changed; ``notify: null`` removes the notification settings."""

    model_config = ConfigDict(extra="forbid")

    title: Title | None = None
    allocation: list[AllocationStep] | None = Field(None, min_length=1, max_length=100)
    notify: NotifyIn | None = None


class DiagnosisSummary(BaseModel):
    version: int
    status: str = Field(description="healthy | watch | alert, or no_data before any unit")
    as_of: dt.date | None
    computed_at: dt.datetime
    url: str


class ExperimentOut(BaseModel):
    id: str
    title: str
    start_date: dt.date
    arms: list[str]
    allocation: list[dict[str, Any]] = Field(
        description="normalised schedule: [{from, weights: [per arm, in arm order]}]")
    notify: NotifyOut | None
    created_at: dt.datetime
    updated_at: dt.datetime
    diagnosis: DiagnosisSummary | None = Field(description="the latest diagnosis, if any")
    links: dict[str, str]


class ExperimentPatchResult(ExperimentOut):
    alerts_opened: int = 0
    alerts_resolved: int = 0


class ExperimentPage(BaseModel):
    items: list[ExperimentOut]
    next: str | None = Field(description="cursor for the next page, null on the last page")
