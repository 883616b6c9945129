"""Answers encoded once, by the route, for the hot sync routes (queue claims and submits).

FastAPI checks what a route returns against its `response_model` and then encodes it; for a sync
route that check takes another trip through the thread pool, and for a model instance the route
just built (and pydantic just validated) it finds nothing to change. Returning the encoded answer
skips both; the route keeps `response_model` for its OpenAPI schema, and the bytes are the ones
FastAPI would send (pydantic's JSON of the model, by alias; tests/queue/test_queue_api.py
compares them).
"""

from __future__ import annotations

from fastapi.responses import Response
from pydantic import BaseModel


def json_answer(model: BaseModel, *, status_code: int = 200) -> Response:
    """The model as its route's JSON answer, with this status."""
    return Response(
        content=model.model_dump_json(by_alias=True),
        status_code=status_code,
        media_type="application/json",
    )
