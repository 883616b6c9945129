"""Security headers on every answer, no-store on private ones, the CSV formula guard and the
one error shape the OpenAPI schema declares."""

from __future__ import annotations

import csv
import io

import pytest

from expertloop.reports.schemas import RoundReportRow
from expertloop.reports.table import rows_csv
from expertloop.security_headers import CONTENT_SECURITY_POLICY


@pytest.mark.parametrize(
    "path", ["/login", "/healthz", "/api/me", "/api/loops/nope", "/api/jobs/x", "/static/bench.js"]
)
def test_every_answer_carries_the_security_headers(client, admin, path):
    response = client.get(path, headers=admin)
    assert response.headers["x-content-type-options"] == "nosniff"
    assert response.headers["content-security-policy"] == CONTENT_SECURITY_POLICY
    assert "frame-ancestors 'none'" in CONTENT_SECURITY_POLICY
    assert "'unsafe-inline'" not in CONTENT_SECURITY_POLICY
    assert response.headers["referrer-policy"] == "same-origin"
    cache = response.headers.get("cache-control", "")
    assert ("no-store" in cache) == (not path.startswith("/static/"))


def test_pages_need_no_inline_script_or_style(client, make_user, admin):
    from html.parser import HTMLParser

    from tests.helpers import DISCRETE_SPEC, sign_in_form

    assert client.post("/api/loops", json=DISCRETE_SPEC, headers=admin).status_code == 201
    client.post("/api/loops/aisle-crossing/rounds", json={"learner_version": "v1"}, headers=admin)

    class Inline(HTMLParser):
        found: list[str] = []

        def handle_starttag(self, tag, attrs):
            names = dict(attrs)
            if tag == "style" or "style" in names or any(n.startswith("on") for n in names):
                self.found.append(tag)
            if tag == "script" and "src" not in names and names.get("type") != "application/json":
                self.found.append(tag)

    make_user("annotator", name="ann", password="pw-123456")
    signed = sign_in_form(client, "ann", "pw-123456")
    assert signed.status_code in (200, 303), signed.text[:300]
    for page in ("/login", "/", "/loops/aisle-crossing", "/loops/aisle-crossing/bench"):
        parser = Inline()
        parser.found = []
        parser.feed(client.get(page).text)
        assert parser.found == [], (page, parser.found)


@pytest.mark.parametrize(
    "version",
    ["=1+1", "+1", "-1", "@SUM(A1)", "\t=1", "\r=1", " =1", "  @x", "\n+1", " \t-2"],
)
def test_csv_guard_covers_every_formula_lead(version):
    # the leads: docs/references.md, "Hostile input" (OWASP's list, and after white space)
    counts = {
        name: 0
        for name, field in RoundReportRow.model_fields.items()
        if field.annotation in (int, "int")
    }
    row = RoundReportRow.model_validate(
        {name: None for name in RoundReportRow.model_fields}
        | counts
        | {"round": 1, "learner_version": version, "status": "open"}
    )
    cells = next(r for r in csv.DictReader(io.StringIO(rows_csv([row]))) if r["round"] == "1")
    assert cells["learner_version"] == "'" + version


def test_validation_errors_match_the_declared_error_shape(client, admin):
    schema = client.get("/openapi.json").json()
    error = schema["components"]["schemas"]["ErrorRead"]
    assert error["properties"]["detail"]["type"] == "string"
    assert "HTTPValidationError" not in schema["components"]["schemas"]
    job = schema["paths"]["/api/jobs/{job_id}"]["get"]["responses"]
    for status in ("401", "403", "404", "422", "503"):
        assert job[status]["content"]["application/json"]["schema"]["$ref"].endswith("ErrorRead")
    upload = schema["paths"]["/api/loops/{slug}/rounds/{number}/rollouts"]["post"]["responses"]
    assert "413" in upload and "409" in upload
    answer = client.get("/api/jobs/abc", headers=admin).json()
    assert isinstance(answer["detail"], str) and answer["errors"][0]["loc"] == ["path", "job_id"]


def test_images_are_served_with_their_own_type_and_old_blobs_only_as_downloads(
    client, settings, admin, make_user
):
    import base64
    import hashlib
    import json

    from tests.helpers import DISCRETE_SPEC

    assert client.post("/api/loops", json=DISCRETE_SPEC, headers=admin).status_code == 201
    client.post("/api/loops/aisle-crossing/rounds", json={"learner_version": "v1"}, headers=admin)
    uploader = make_user("uploader", name="fleet")
    annotator = make_user("annotator", name="ann")
    webp = b"RIFF\x10\x00\x00\x00WEBPVP8 " + b"\x00" * 16
    row = {"rollout": "r0", "step": 0, "time_s": 0.0, "features": [1.0, 2.0, 3.0]}
    row["image"] = base64.b64encode(webp).decode()
    sent = client.post(
        "/api/loops/aisle-crossing/rounds/1/rollouts",
        files={"file": ("a.jsonl", json.dumps(row).encode())},
        headers=uploader,
    )
    assert sent.status_code == 201, sent.text
    image = client.get(f"/api/images/{hashlib.sha256(webp).hexdigest()}", headers=annotator)
    assert image.headers["content-type"] == "image/webp"
    assert image.headers["x-content-type-options"] == "nosniff"
    # a blob stored before images were checked (here: HTML) is never offered as a page
    html = b"<html><script>alert(1)</script></html>"
    digest = hashlib.sha256(html).hexdigest()
    (settings.blob_dir / digest[:2]).mkdir(parents=True, exist_ok=True)
    (settings.blob_dir / digest[:2] / digest).write_bytes(html)
    old = client.get(f"/api/images/{digest}", headers=annotator)
    assert old.headers["content-type"] == "application/octet-stream"
    assert old.headers["content-disposition"] == "attachment"
    assert old.headers["x-content-type-options"] == "nosniff"


def _declared(schema, method: str, template: str, response) -> None:
    """The answer's status is declared for the operation, with the answer's content type."""
    declared = schema["paths"][template][method]["responses"]
    status = str(response.status_code)
    assert status in declared, f"{method} {template}: {status} not declared ({sorted(declared)})"
    kind = response.headers.get("content-type", "").split(";")[0].strip()
    if kind:  # a redirect has no body
        content = declared[status].get("content", {})
        assert kind in content, f"{method} {template} {status}: {kind} not in {sorted(content)}"


def test_answers_that_are_not_json_are_declared_with_their_own_content_type(
    client, admin, make_user
):
    """Found by fuzzing from outside (schemathesis, content_type_conformance): exports, images,
    metrics, the CSV and the browser pages' error pages and sign-in redirects were declared as
    JSON or not at all."""
    import base64
    import hashlib
    import json

    from tests.helpers import DISCRETE_SPEC, discrete_rows, parquet_bytes

    schema = client.get("/openapi.json").json()
    slug = DISCRETE_SPEC["slug"]
    assert client.post("/api/loops", json=DISCRETE_SPEC, headers=admin).status_code == 201
    client.post(f"/api/loops/{slug}/rounds", json={"learner_version": "v1"}, headers=admin)
    uploader = make_user("uploader", name="fleet")
    annotator = make_user("annotator", name="ann")
    seed = parquet_bytes(discrete_rows(1, 4, expert=True))
    sent = client.post(
        f"/api/loops/{slug}/rounds/0/rollouts",
        files={"file": ("d.parquet", seed)},
        headers=uploader,
    )
    assert sent.status_code == 201, sent.text
    png = b"\x89PNG\r\n\x1a\n" + b"\x00" * 16
    row = {"rollout": "run-1", "step": 0, "time_s": 0.0, "features": [1.0, 2.0, 3.0]}
    row["image"] = base64.b64encode(png).decode()
    sent = client.post(
        f"/api/loops/{slug}/rounds/1/rollouts",
        files={"file": ("a.jsonl", json.dumps(row).encode())},
        headers=uploader,
    )
    assert sent.status_code == 201, sent.text
    assert client.post(f"/api/loops/{slug}/snapshots", json={}, headers=admin).status_code == 201

    for file_format in ("parquet", "npz", "jsonl"):
        answer = client.get(
            f"/api/loops/{slug}/snapshots/v1/export?format={file_format}", headers=admin
        )
        assert answer.status_code == 200
        _declared(schema, "get", "/api/loops/{slug}/snapshots/{version}/export", answer)
    image = client.get(f"/api/images/{hashlib.sha256(png).hexdigest()}", headers=annotator)
    assert image.status_code == 200
    _declared(schema, "get", "/api/images/{sha256}", image)
    _declared(schema, "get", "/metrics", client.get("/metrics", headers=admin))
    _declared(
        schema,
        "get",
        "/api/loops/{slug}/report.csv",
        client.get(f"/api/loops/{slug}/report.csv", headers=admin),
    )

    # browser pages: errors as pages, or JSON to a client that accepts only JSON
    pages = [
        ("/", "/"),
        ("/loops/{slug}", f"/loops/{slug}"),
        ("/loops/{slug}/bench", f"/loops/{slug}/bench"),
    ]
    wrong = {"Authorization": "Bearer el_not-a-token"}
    for template, path in pages:
        for headers, status in ((wrong, 401), ({}, 303)):
            answer = client.get(path, headers=headers, follow_redirects=False)
            assert answer.status_code == status
            _declared(schema, "get", template, answer)
            json_only = client.get(path, headers={**headers, "Accept": "application/json"})
            assert json_only.status_code == 401
            _declared(schema, "get", template, json_only)
    for template in ("/loops/{slug}", "/loops/{slug}/bench"):
        missing = client.get(template.replace("{slug}", "no-such-loop"), headers=admin)
        assert missing.status_code == 404 and missing.headers["content-type"].startswith(
            "text/html"
        )
        _declared(schema, "get", template, missing)
    refused = client.get(f"/loops/{slug}/bench", headers=uploader)
    assert refused.status_code == 403
    _declared(schema, "get", "/loops/{slug}/bench", refused)
    out = client.post("/logout", headers=admin, follow_redirects=False)
    assert out.status_code == 303
    _declared(schema, "post", "/logout", out)


def test_the_schema_states_the_submission_id_and_version_rules_the_service_applies(client, admin):
    """Found by fuzzing (positive_data_acceptance): the schema let any text up to 64 characters
    be a submission id and any text a snapshot version, so schema-valid requests were refused."""
    import re

    from expertloop.errors import InvalidInput
    from expertloop.loops.schemas import LoopSettings
    from expertloop.queue.answers import check_request
    from tests.helpers import DISCRETE_SPEC

    schema = client.get("/openapi.json").json()
    bodies = schema["components"]["schemas"]
    for body in ("LabelCreate", "UndoCreate", "ChangeCreate"):
        pattern = bodies[body]["properties"]["submission_id"]["pattern"]
        for sent in (
            "abcd-123",
            "A" * 48,
            "a_b-c" * 9,
            "abc1234",
            "A" * 49,
            "abcd 123",
            "abcd12é3",
        ):
            try:
                check_request(
                    LoopSettings(),
                    submission_id=sent,
                    answer="unsure",
                    span_steps=0,
                    seconds_spent=None,
                )
                taken = True
            except InvalidInput:
                taken = False
            assert taken == bool(re.search(pattern, sent)), (body, sent)

    slug = DISCRETE_SPEC["slug"]
    assert client.post("/api/loops", json=DISCRETE_SPEC, headers=admin).status_code == 201
    for template in (
        "/api/loops/{slug}/snapshots/{version}",
        "/api/loops/{slug}/snapshots/{version}/export",
    ):
        parameters = schema["paths"][template]["get"]["parameters"]
        pattern = next(p for p in parameters if p["name"] == "version")["schema"]["pattern"]
        for version in (
            "v1",
            "v999999999",
            "latest",
            "v0",
            "v01",
            "V1",
            "v1000000000",
            "v١",
            "Latest",
        ):
            got = client.get(template.format(slug=slug, version=version), headers=admin)
            # no snapshot exists: a version the service takes is not found, any other refused
            assert got.status_code == (404 if re.search(pattern, version) else 422), (
                template,
                version,
            )
