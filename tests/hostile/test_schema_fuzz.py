"""A bounded OpenAPI fuzz run (schemathesis): every API operation, a few generated requests
each, sent with an admin and an annotator token. No answer may be a server error, and every
answer must match the schema: its status declared, its content type and body as declared."""

from __future__ import annotations

import pytest
import schemathesis
from hypothesis import HealthCheck, settings
from schemathesis.checks import not_a_server_error
from schemathesis.specs.openapi.checks import (
    content_type_conformance,
    response_schema_conformance,
    status_code_conformance,
)

from tests.helpers import discrete_rows, parquet_bytes

CHECKS = [
    not_a_server_error,
    status_code_conformance,
    content_type_conformance,
    response_schema_conformance,
]
EXAMPLES_PER_OPERATION = 4


@pytest.fixture
def annotator(make_user):
    return make_user("annotator", name="fuzz-annotator")


@pytest.fixture
def api_schema(app, client, loops, admin, uploader, annotator):
    """The app's schema, with a loop, an open round and a few rollouts in the store."""
    uploaded = client.post(
        "/api/loops/aisle-crossing/rounds/1/rollouts",
        files={"file": ("r.parquet", parquet_bytes(discrete_rows(2, 5)))},
        headers=uploader,
    )
    assert uploaded.status_code == 201
    return schemathesis.openapi.from_asgi("/openapi.json", app)


schema = schemathesis.pytest.from_fixture("api_schema")


@pytest.mark.slow
@schema.include(path_regex=r"^/api/").parametrize()
@settings(
    max_examples=EXAMPLES_PER_OPERATION,
    deadline=None,
    derandomize=True,
    database=None,  # no .hypothesis folder in the checkout
    suppress_health_check=list(HealthCheck),
)
def test_api_answers_match_the_schema(case, admin, annotator):
    for headers in (admin, annotator):
        case.call_and_validate(headers={**(case.headers or {}), **headers}, checks=CHECKS)
