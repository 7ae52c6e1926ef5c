"""What route handlers receive: the service's parts, opened by the app's lifespan (never module globals)."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Annotated

from fastapi import Depends, Request

from service.api.metrics import ServiceMetrics
from service.config import Settings
from service.events.event import Pseudonyms
from service.events.log import EventLog
from service.resilience.guards import Guards
from service.runtime.active import ActiveModel
from service.runtime.visits import Visits
from service.store.base import SessionStore


@dataclass
class Service:
    settings: Settings
    store: SessionStore
    active: ActiveModel
    visits: Visits
    metrics: ServiceMetrics
    guards: Guards
    events: EventLog | None = None  # the click event log; None with CAIRN_EVENTS=off
    pseudonyms: Pseudonyms | None = None  # session ids as events keep them


async def get_service(request: Request) -> Service:
    # async: FastAPI runs a plain `def` dependency in a worker thread, a hop on every request.
    return request.app.state.service


ServiceDep = Annotated[Service, Depends(get_service)]
