"""Routes added after the foundation: (method, OpenAPI path) -> roles admitted besides admin."""

from __future__ import annotations

EXTRA_ROUTE_ROLES: dict[tuple[str, str], set[str]] = {
    ("POST", "/api/loops/{slug}/queue/claim"): {"annotator"},
    ("POST", "/api/loops/{slug}/queue/items/{item_id}/renew"): {"annotator"},
    ("POST", "/api/loops/{slug}/queue/items/{item_id}/skip"): {"annotator"},
    ("POST", "/api/loops/{slug}/queue/items/{item_id}/labels"): {"annotator"},
    ("GET", "/api/loops/{slug}/queue/progress"): {"annotator"},
    ("GET", "/api/loops/{slug}/rounds/{number}/queue"): set(),
    ("GET", "/loops/{slug}/bench"): {"annotator"},
}
