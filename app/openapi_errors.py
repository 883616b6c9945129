"""The one error shape of every answer, and the error statuses each route declares in the schema.

Every error is JSON `{"detail": "<one sentence a person can act on>"}`; a 422 for a malformed
request adds `errors`, one entry per problem with its location. FastAPI's default schema declares
`detail` as a list for 422; we declare what we answer instead.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from fastapi import APIRouter, FastAPI
from fastapi.openapi.utils import get_openapi
from fastapi.routing import APIRoute
from pydantic import BaseModel

from .deps import Roles
from .error_pages import is_page_path


class Problem(BaseModel):
    """One problem of a malformed request: where it is and what is wrong."""

    loc: list[str | int]
    msg: str


class ErrorRead(BaseModel):
    """Every error answer."""

    detail: str
    errors: list[Problem] | None = None


WHY = {
    400: "The body could not be parsed (not JSON, or not the declared form encoding).",
    401: "No valid credentials were sent.",
    403: "The credentials lack the role, or the CSRF token is missing or wrong.",
    404: "A named loop, round, rollout, state, job, version or image does not exist.",
    409: "The request conflicts with what is stored (for example a closed round).",
    413: "The request is larger than the upload limit.",
    422: "The request is malformed or breaks a rule; `detail` names the field, row or line.",
    429: "Too many attempts; wait for the seconds in Retry-After.",
    503: "The database is unreachable right now; nothing was changed (see Retry-After).",
}
_REF = "#/components/schemas/ErrorRead"
# Browser routes answer errors as pages (app.error_pages), or as ErrorRead JSON to a client that
# accepts only JSON; validation errors (422) and the request guard's refusals are always JSON.
_PAGE_ERROR = {
    "text/html": {"schema": {"type": "string"}},
    "application/json": {"schema": {"$ref": _REF}},
}
_SIGN_IN = {
    "description": "No credentials were sent: a browser is sent to the sign-in form, with this "
    "page as `next` (Location).",
    "headers": {"Location": {"schema": {"type": "string"}}},
}


CHANGES = frozenset({"POST", "PUT", "PATCH", "DELETE"})


def _needs_role(route: APIRoute) -> bool:
    return any(isinstance(d.call, Roles) for d in _walk(route.dependant.dependencies))


def _statuses(route: APIRoute) -> set[int]:
    found = {503}
    # path and query parameters may be declared by dependencies (LoopDep takes the slug)
    dependants = [route.dependant, *_walk(route.dependant.dependencies)]
    path_params = any(d.path_params for d in dependants)
    if _needs_role(route):
        found |= {401, 403}
    if path_params:
        found.add(404)
    if path_params or any(d.query_params for d in dependants):
        found.add(422)
    if route.body_field is not None:
        found |= {400, 422}
    if (route.methods or set()) & CHANGES:
        found |= {409, 422}
    return found


def _walk(dependencies: list[Any]) -> list[Any]:
    out = []
    for dependency in dependencies:
        out.append(dependency)
        out += _walk(dependency.dependencies)
    return out


def install(
    app: FastAPI, routers: Sequence[APIRouter], extra: dict[str, set[int]] | None = None
) -> None:
    """Make `app.openapi()` declare ErrorRead for every error status each route of `routers`
    (included in `app` without a further prefix) can give.

    `extra` adds statuses by route path (for example 413 for uploads).
    """
    extra = extra or {}

    def openapi() -> dict[str, Any]:
        if app.openapi_schema:
            return app.openapi_schema
        schema = get_openapi(title=app.title, version=app.version, routes=app.routes)
        components = schema.setdefault("components", {}).setdefault("schemas", {})
        components["ErrorRead"] = ErrorRead.model_json_schema(ref_template=_REF_TEMPLATE)
        components["Problem"] = Problem.model_json_schema()
        components.pop("HTTPValidationError", None)
        components.pop("ValidationError", None)
        for route in (r for router in routers for r in router.routes):
            if not isinstance(route, APIRoute) or not route.include_in_schema:
                continue
            statuses = _statuses(route) | extra.get(route.path, set())
            page = is_page_path(route.path)
            content = _PAGE_ERROR if page else {"application/json": {"schema": {"$ref": _REF}}}
            for method in route.methods or ():
                operation = schema["paths"][route.path_format][method.lower()]
                responses = operation.setdefault("responses", {})
                for status in sorted(statuses):
                    if status in route.responses:  # the route declares this one itself
                        continue
                    responses[str(status)] = {"description": WHY[status], "content": content}
                if page and _needs_role(route) and 303 not in route.responses:
                    responses["303"] = _SIGN_IN
        app.openapi_schema = schema
        return schema

    app.openapi = openapi  # type: ignore[method-assign]


_REF_TEMPLATE = "#/components/schemas/{model}"
