"""Small builders shared by tests: loop specs and rollout tables in the file contract."""

from __future__ import annotations

import io
import json
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
from numpy.typing import ArrayLike

DISCRETE_SPEC: dict[str, Any] = {
    "slug": "aisle-crossing",
    "title": "Aisle crossing (test)",
    "features": [
        {"name": "gap_m", "unit": "m"},
        {"name": "speed", "unit": "m/s"},
        {"name": "occluded", "unit": ""},
    ],
    "action_space": {"kind": "discrete", "actions": ["proceed", "creep", "hold"]},
}

CONTINUOUS_SPEC: dict[str, Any] = {
    "slug": "aisle-speed",
    "title": "Aisle speed (test)",
    "features": [{"name": "gap_m", "unit": "m"}, {"name": "speed", "unit": "m/s"}],
    "action_space": {
        "kind": "continuous",
        "dimensions": [
            {"name": "speed_cmd", "low": 0.0, "high": 2.0, "unit": "m/s"},
            {"name": "curvature", "low": -0.2, "high": 0.2, "unit": "1/m"},
        ],
    },
}


def discrete_rows(
    n_rollouts: int = 2, steps: int = 5, *, seed: int = 0, expert: bool = False, prefix: str = "r"
) -> dict[str, list[Any]]:
    """Columns of a small discrete rollout file (learner-driven unless expert=True)."""
    rng = np.random.default_rng(seed)
    cols: dict[str, list[Any]] = {
        k: []
        for k in (
            "rollout",
            "step",
            "time_s",
            "features",
            "control",
            "learner_action",
            "learner_probs",
            "expert_action",
        )
    }
    actions = ["proceed", "creep", "hold"]
    for r in range(n_rollouts):
        for s in range(steps):
            probs = rng.dirichlet(np.ones(3)).astype(np.float32)
            probs = (probs / probs.sum()).tolist()
            cols["rollout"].append(f"{prefix}{r}")
            cols["step"].append(s)
            cols["time_s"].append(0.1 * s)
            cols["features"].append(rng.normal(size=3).round(3).tolist())
            cols["control"].append("expert" if expert else "learner")
            cols["learner_action"].append(None if expert else actions[int(np.argmax(probs))])
            cols["learner_probs"].append(None if expert else probs)
            cols["expert_action"].append(actions[s % 3] if expert else None)
    return cols


def parquet_bytes(columns: dict[str, list[Any]] | pa.Table) -> bytes:
    table = columns if isinstance(columns, pa.Table) else pa.table(columns)
    sink = io.BytesIO()
    pq.write_table(table, sink)
    return sink.getvalue()


def jsonl_bytes(columns: dict[str, list[Any]]) -> bytes:
    names = list(columns)
    n = len(columns[names[0]])
    lines = [
        json.dumps({k: columns[k][i] for k in names if columns[k][i] is not None}) for i in range(n)
    ]
    return ("\n".join(lines) + "\n").encode()


def npz_bytes(arrays: dict[str, np.ndarray]) -> bytes:
    sink = io.BytesIO()
    np.savez(sink, **arrays)
    return sink.getvalue()


def sign_in_form(client: Any, name: str, password: str, next_url: str | None = None) -> Any:
    """Sign in as a browser does: fetch the form (its CSRF cookie and field), then post it."""
    import re

    page = client.get("/login")
    token = re.search(r'name="csrf_token" value="([^"]+)"', page.text)
    assert token, "the sign-in form carries a CSRF token"
    data = {"name": name, "password": password, "csrf_token": token.group(1)}
    if next_url is not None:
        data["next"] = next_url
    return client.post("/login", data=data, follow_redirects=False)


def recall_at_k(approx_idx: ArrayLike, exact_idx: ArrayLike) -> float:
    """Fraction of the exact k nearest neighbours that the approximate search found.

    Parameters
    ----------
    approx_idx, exact_idx : array_like of shape (n_queries, k)

    Returns
    -------
    float
        ``mean over queries of |approx ∩ exact| / k``.
    """
    a = np.asarray(approx_idx)
    e = np.asarray(exact_idx)
    if a.shape != e.shape or a.ndim != 2 or a.shape[1] == 0:
        raise ValueError(f"recall_at_k: shapes differ or empty: {a.shape} vs {e.shape}")
    # k is small (tens), so the (n, k, k) comparison is cheap and fully vectorised.
    hits = (a[:, :, None] == e[:, None, :]).any(axis=2)
    return float(hits.sum() / a.size)
