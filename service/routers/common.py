"""Helpers the routers share: links, lookups that answer 404, the per-experiment write lock."""

from __future__ import annotations

from urllib.parse import urlencode

from fastapi import Request
from sqlalchemy.orm import Session

from ..db.locks import lock_experiment_for_write
from ..db.models import Experiment
from ..problems import ProblemError
from ..settings import Settings

# Largest values the id columns hold on every backend: BIGINT ids (alerts, outbox rows) and
# INTEGER ones (token ids, diagnosis versions). Larger ones cannot exist: answer 404 without
# asking the database, which would fail on the out-of-range parameter.
MAX_BIGINT = 2**63 - 1
MAX_INT = 2**31 - 1


def base_url(request: Request) -> str:
    settings: Settings = request.app.state.settings
    return settings.base_url(str(request.base_url))


def next_page_url(request: Request, path: str, cursor: str | None) -> str | None:
    """The request's own URL on ``path`` with ``cursor`` in place of its cursor parameter
    (``None`` without a next page), for the ``next_url`` of cursor-paged lists."""
    if cursor is None:
        return None
    params = [(k, v) for k, v in request.query_params.multi_items() if k != "cursor"]
    return f"{base_url(request)}{path}?{urlencode([*params, ('cursor', cursor)])}"


def experiment_url(request: Request, experiment_id: str, suffix: str = "") -> str:
    return f"{base_url(request)}/v1/experiments/{experiment_id}{suffix}"


def not_found(experiment_id: str) -> ProblemError:
    return ProblemError(404, f"There is no experiment {experiment_id!r}.")


def get_experiment(session: Session, experiment_id: str) -> Experiment:
    experiment = session.get(Experiment, experiment_id)
    if experiment is None:
        raise not_found(experiment_id)
    return experiment


def lock_experiment(session: Session, experiment_id: str) -> Experiment:
    """Start the write transaction and lock the experiment (404 when it does not exist).

    Writers of one experiment are serialised across workers and replicas
    (:mod:`service.db.locks`), so each diagnosis sees every committed row and snapshot versions
    never collide.
    """
    experiment = lock_experiment_for_write(session, experiment_id)
    if experiment is None:
        raise not_found(experiment_id)
    return experiment
