"""The claim latency histogram on /metrics counts every claim this process served."""

from __future__ import annotations

import re


def _claims_counted(client, admin) -> float:
    text = client.get("/metrics", headers=admin).text
    found = re.search(r"^expertloop_claim_seconds_count (\S+)$", text, re.MULTILINE)
    assert found, "the claim histogram is missing from /metrics"
    return float(found.group(1))


def test_claims_are_timed(client, admin, make_loop, make_user):
    slug = make_loop()
    annotator = make_user("annotator", name="metric-annotator")
    before = _claims_counted(client, admin)
    for _ in range(2):
        assert client.post(f"/api/loops/{slug}/queue/claim", headers=annotator).status_code == 200
    assert _claims_counted(client, admin) == before + 2
    depth = re.search(
        r'^expertloop_queue_depth\{loop="([^"]+)"\} (\S+)$',
        client.get("/metrics", headers=admin).text,
        re.MULTILINE,
    )
    assert depth and depth.group(1) == slug and float(depth.group(2)) > 0
