"""The queue's latency instrument, observed where claims are served; /metrics exposes it."""

from __future__ import annotations

from prometheus_client import Histogram

CLAIM_SECONDS = Histogram(
    "expertloop_claim_seconds",
    "Time to claim the next queue item, as served by this process.",
    buckets=(0.002, 0.005, 0.01, 0.02, 0.05, 0.1, 0.25, 0.5, 1.0),
    registry=None,
)
