"""Routes added after the foundation: (method, OpenAPI path) -> roles admitted besides admin.

tests/access/test_role_matrix.py merges this table into its own; keep it a plain dict literal so
branches adding routes merge cleanly.
"""

from __future__ import annotations

READERS = {"uploader", "annotator", "trainer"}

EXTRA_ROUTE_ROLES: dict[tuple[str, str], set[str]] = {
    # loops
    ("PUT", "/api/loops/{slug}/log-mapping"): set(),
    # queue and bench
    ("POST", "/api/loops/{slug}/queue/claim"): {"annotator"},
    ("POST", "/api/loops/{slug}/queue/items/{item_id}/renew"): {"annotator"},
    ("POST", "/api/loops/{slug}/queue/items/{item_id}/skip"): {"annotator"},
    ("POST", "/api/loops/{slug}/queue/items/{item_id}/labels"): {"annotator"},
    ("GET", "/api/loops/{slug}/queue/progress"): {"annotator"},
    ("GET", "/api/loops/{slug}/rounds/{number}/queue"): set(),
    ("GET", "/loops/{slug}/bench"): {"annotator"},
    ("GET", "/api/loops/{slug}/queue/my-labels"): {"annotator"},
    ("POST", "/api/loops/{slug}/queue/my-labels/{label_id}/undo"): {"annotator"},
    ("POST", "/api/loops/{slug}/queue/my-labels/{label_id}/change"): {"annotator"},
    # reports and the loop page
    ("GET", "/api/loops/{slug}/rounds/{number}/report"): READERS,
    ("GET", "/api/loops/{slug}/report"): READERS,
    ("GET", "/api/loops/{slug}/report.csv"): READERS,
    ("GET", "/loops/{slug}"): READERS,
    # snapshots and export
    ("POST", "/api/loops/{slug}/snapshots"): {"trainer"},
    ("GET", "/api/loops/{slug}/snapshots"): {"trainer"},
    ("GET", "/api/loops/{slug}/snapshots/{version}"): {"trainer"},
    ("GET", "/api/loops/{slug}/snapshots/{version}/export"): {"trainer"},
}
