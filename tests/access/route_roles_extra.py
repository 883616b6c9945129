"""Roles of routes added by later domains, merged into tests/access/test_role_matrix.py.

(method, OpenAPI path) -> roles admitted besides admin.
"""

from __future__ import annotations

EXTRA_ROUTE_ROLES: dict[tuple[str, str], set[str]] = {
    ("POST", "/api/loops/{slug}/snapshots"): {"trainer"},
    ("GET", "/api/loops/{slug}/snapshots"): {"trainer"},
    ("GET", "/api/loops/{slug}/snapshots/{version}"): {"trainer"},
    ("GET", "/api/loops/{slug}/snapshots/{version}/export"): {"trainer"},
}
