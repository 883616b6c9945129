"""Routes added by later domains: (method, OpenAPI path) -> roles admitted besides admin.

tests/access/test_role_matrix.py merges this table into its own; keep it a plain dict literal so
branches adding routes merge cleanly.
"""

EXTRA_ROUTE_ROLES: dict[tuple[str, str], set[str]] = {
    ("GET", "/api/loops/{slug}/rounds/{number}/report"): {"uploader", "annotator", "trainer"},
    ("GET", "/api/loops/{slug}/report"): {"uploader", "annotator", "trainer"},
    ("GET", "/api/loops/{slug}/report.csv"): {"uploader", "annotator", "trainer"},
    ("GET", "/loops/{slug}"): {"uploader", "annotator", "trainer"},
}
