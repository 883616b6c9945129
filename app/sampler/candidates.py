"""Load a round's steps in bulk as numpy arrays: the sampler's candidates and their context."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from sqlalchemy import select
from sqlalchemy.orm import Session

from ..ingest.models import CONTROL_EXPERT, Step
from ..loops.models import Loop, Round
from ..loops.spec import spec_of
from ..shared.encode import FLOAT32_LE, nullable_rows

FETCH_ROWS = 50_000


@dataclass
class RoundSteps:
    """Every step of a round (learner- and expert-driven), in id order.

    features : ndarray of shape (n_steps, n_features), float32
    probs : (n_steps, n_actions) float32 or None; has_probs (n_steps,) bool
    ensemble : (n_steps, n_members, width) float32 or None; has_ensemble (n_steps,) bool
    std : (n_steps, n_dims) float32 or None; has_std (n_steps,) bool
    """

    step_id: np.ndarray
    rollout_id: np.ndarray
    step_index: np.ndarray
    time_s: np.ndarray
    expert: np.ndarray
    features: np.ndarray
    probs: np.ndarray | None
    has_probs: np.ndarray
    ensemble: np.ndarray | None
    has_ensemble: np.ndarray
    std: np.ndarray | None
    has_std: np.ndarray


def _matrix(
    blobs: list[bytes | None], shape: tuple[int, ...]
) -> tuple[np.ndarray | None, np.ndarray]:
    """Learner outputs of each step (zeros where absent), or None when no step has any."""
    rows, present = nullable_rows(blobs, shape, fill=0.0, dtype=np.float32)
    return (rows if present.any() else None), present


def load_round_steps(session: Session, *, loop: Loop, rnd: Round) -> RoundSteps:
    """All steps of a round, fetched in batches and decoded a column at a time."""
    spec = spec_of(loop)
    width, n_actions = spec.n_features, spec.action_width
    columns: dict[str, list] = {
        k: []
        for k in (
            "id",
            "rollout_id",
            "step_index",
            "time_s",
            "control",
            "features",
            "probs",
            "ensemble",
            "size",
            "std",
        )
    }
    query = (
        select(
            Step.id,
            Step.rollout_id,
            Step.step_index,
            Step.time_s,
            Step.control,
            Step.features,
            Step.learner_probs,
            Step.learner_ensemble,
            Step.ensemble_size,
            Step.learner_std,
        )
        .where(Step.round_id == rnd.id)
        .order_by(Step.id)
        .execution_options(yield_per=FETCH_ROWS)
    )
    for row in session.execute(query):
        for key, value in zip(columns, row, strict=True):
            columns[key].append(value)
    n = len(columns["id"])
    features = (
        np.frombuffer(b"".join(columns["features"]), dtype=FLOAT32_LE).reshape(n, width)
        if n
        else np.empty((0, width), np.float32)
    )
    sizes = {s for s in columns["size"] if s is not None}
    members = sizes.pop() if sizes else 0
    probs, has_probs = _matrix(columns["probs"], (n_actions,))
    ensemble, has_ensemble = (
        _matrix(columns["ensemble"], (members, n_actions)) if members else (None, np.zeros(n, bool))
    )
    std, has_std = _matrix(columns["std"], (n_actions,))
    return RoundSteps(
        step_id=np.array(columns["id"], dtype=np.int64),
        rollout_id=np.array(columns["rollout_id"], dtype=np.int64),
        step_index=np.array(columns["step_index"], dtype=np.int64),
        time_s=np.array(columns["time_s"], dtype=np.float64),
        expert=np.array(columns["control"], dtype=np.int64) == CONTROL_EXPERT,
        features=features.astype(np.float32, copy=False),
        probs=probs,
        has_probs=has_probs,
        ensemble=ensemble,
        has_ensemble=has_ensemble,
        std=std,
        has_std=has_std,
    )
