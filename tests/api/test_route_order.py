"""The app tries its routes in an order chosen for speed (app/main.py: the most frequent calls
first), which is safe only while no address fits routes of two different routers: then the order
of the routers decides nothing about which route answers."""

from __future__ import annotations

import re

from fastapi.routing import APIRoute

from expertloop.auth.router import router as auth_router
from expertloop.ingest.router import router as ingest_router
from expertloop.jobs.router import router as jobs_router
from expertloop.loops.page import router as home_router
from expertloop.loops.router import router as loops_router
from expertloop.queue.router import router as queue_router
from expertloop.reports.router import router as reports_router
from expertloop.revisions.router import router as revisions_router
from expertloop.sampler.router import router as sampler_router
from expertloop.snapshots.router import router as snapshots_router
from expertloop.system.router import router as system_router

ROUTERS = {
    "auth": auth_router,
    "ingest": ingest_router,
    "jobs": jobs_router,
    "home": home_router,
    "loops": loops_router,
    "queue": queue_router,
    "reports": reports_router,
    "revisions": revisions_router,
    "sampler": sampler_router,
    "snapshots": snapshots_router,
    "system": system_router,
}
# Values a path parameter may take that also spell a fixed segment of some route.
SEGMENTS = sorted(
    {
        part
        for router in ROUTERS.values()
        for route in router.routes
        for part in getattr(route, "path", "").split("/")
        if part and "{" not in part
    }
)


def addresses(path: str) -> list[str]:
    """The path with each parameter filled by a number, a name, or any fixed segment."""
    found = [path]
    while any("{" in p for p in found):
        found = [
            re.sub(r"\{[^}]+\}", value, p, count=1)
            for p in found
            for value in ("1", "x", *SEGMENTS)
        ]
    return found


def test_the_app_serves_every_routers_routes_once(app):
    served = [route for route in app.routes if isinstance(route, APIRoute)]
    assert sorted(map(id, served)) == sorted(
        id(route) for router in ROUTERS.values() for route in router.routes
    )


def test_no_address_fits_routes_of_two_routers():
    owner = {id(route): name for name, router in ROUTERS.items() for route in router.routes}
    every = [route for router in ROUTERS.values() for route in router.routes]
    assert all(isinstance(route, APIRoute) for route in every)
    for route in every:
        assert isinstance(route, APIRoute)
        for address in addresses(route.path):
            fitting = {
                owner[id(other)]
                for other in every
                if isinstance(other, APIRoute) and other.path_regex.match(address)
            }
            assert fitting == {owner[id(route)]}, (route.path, address, fitting)
