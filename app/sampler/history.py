"""Load what a loop's labelled rounds say about the sampler: signals and disagreement per state.

Store access in bulk (one query per round's selection, chunked by step ids); the fit itself is
the pure app.sampler.tuning.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from sqlalchemy import select
from sqlalchemy.orm import Session

from ..ingest.models import Step
from ..loops.models import Loop, Round
from ..loops.spec import spec_of
from ..shared import training_set as ts
from ..shared.encode import stored_actions
from . import service
from .models import REASON_AUDIT, SelectedState, Selection
from .rank import NEUTRAL_PERCENTILE
from .tuning import disagreement_of, stratum_weights

CHUNK = 5_000


@dataclass
class LabelledStates:
    """Labelled selected states of earlier rounds (arrays share the first axis)."""

    signals: np.ndarray  # (n, 3) in app.sampler.tuning.SIGNALS order
    disagrees: np.ndarray  # (n,) bool
    weights: np.ndarray  # (n,) stratum weights, round by round
    is_audit: np.ndarray  # (n,) bool

    def __len__(self) -> int:
        return len(self.disagrees)


def near_takeover_of(selection: Selection, step_ids: np.ndarray) -> np.ndarray:
    """Whether each chosen step was within the window before a takeover, from the stored scores."""
    packed = service.candidate_scores(selection)
    if not packed:
        return np.zeros(len(step_ids), dtype=bool)
    flag = packed.get("near_takeover")
    flag = packed["boost"] > 0 if flag is None else flag.astype(bool)
    at = np.clip(np.searchsorted(packed["step_id"], step_ids), 0, len(packed["step_id"]) - 1)
    return np.asarray(flag[at] & (packed["step_id"][at] == step_ids), dtype=bool)


def learner_actions(session: Session, loop: Loop, step_ids: np.ndarray) -> np.ndarray:
    """The learner's recorded action at each step (sorted ids in), -1 / NaN where absent."""
    indexes: list[int | None] = []
    vectors: list[bytes | None] = []
    for i in range(0, len(step_ids), CHUNK):
        rows = session.execute(
            select(Step.learner_action, Step.learner_action_vec)
            .where(Step.id.in_(step_ids[i : i + CHUNK].tolist()))
            .order_by(Step.id)
        ).all()
        indexes.extend(r.learner_action for r in rows)
        vectors.extend(r.learner_action_vec for r in rows)
    spec = spec_of(loop)
    return stored_actions(indexes, vectors, discrete=spec.is_discrete, width=spec.action_width)


def expert_actions(
    found: ts.Relabels, step_ids: np.ndarray, *, discrete: bool, width: int
) -> np.ndarray:
    """Consensus action of each step id; -1 (discrete) or a NaN row (continuous, ``width``
    dimensions) where unlabelled or unresolved."""
    hit = np.zeros(len(step_ids), dtype=bool)
    at = np.zeros(len(step_ids), dtype=np.int64)
    if len(found.step_id):
        at = np.minimum(np.searchsorted(found.step_id, step_ids), len(found.step_id) - 1)
        hit = (found.step_id[at] == step_ids) & found.resolved[at]
    if discrete:
        out = np.full(len(step_ids), -1, dtype=np.int64)
        out[hit] = found.action[at[hit]]
        return out
    vec = np.full((len(step_ids), width), np.nan)
    vec[hit] = found.action[at[hit]]
    return vec


def selection_states(
    session: Session, selection: Selection
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Chosen step ids (sorted), whether each is an audit pick, and their signals (n, 3)."""
    rows = session.execute(
        select(
            SelectedState.step_id,
            SelectedState.reason,
            SelectedState.uncertainty_pct,
            SelectedState.novelty_pct,
        )
        .where(SelectedState.selection_id == selection.id)
        .order_by(SelectedState.step_id)
    ).all()
    step_ids = np.array([r.step_id for r in rows], dtype=np.int64)
    is_audit = np.array([r.reason == REASON_AUDIT for r in rows], dtype=bool)
    u_pct = np.array(
        [NEUTRAL_PERCENTILE if r.uncertainty_pct is None else r.uncertainty_pct for r in rows],
        np.float64,
    )
    n_pct = np.array([r.novelty_pct for r in rows], dtype=np.float64)
    near = near_takeover_of(selection, step_ids).astype(np.float64)
    return step_ids, is_audit, np.column_stack([u_pct, n_pct, near]).reshape(-1, 3)


def labelled_states(
    session: Session, *, loop: Loop, before_round: int, cutoff: ts.Cutoff
) -> LabelledStates:
    """Every selected state of rounds 1..before_round-1 with a resolved label within the cut-off."""
    spec = spec_of(loop)
    found = ts.relabels(session, loop=loop, spec=spec, cutoff=cutoff)
    discrete = spec.is_discrete
    tolerance = None if discrete else spec.tolerance
    selections = session.scalars(
        select(Selection)
        .join(Round, Round.id == Selection.round_id)
        .where(Round.loop_id == loop.id, Round.number >= 1, Round.number < before_round)
        .order_by(Round.number)
    ).all()
    parts: list[tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]] = []
    for chosen in selections:
        step_ids, is_audit, signals = selection_states(session, chosen)
        if len(step_ids) == 0:
            continue
        learner = learner_actions(session, loop, step_ids)
        expert = expert_actions(found, step_ids, discrete=discrete, width=spec.action_width)
        disagrees, known = disagreement_of(learner, expert, tolerance)
        # weights from the whole selection, so unlabelled picks do not inflate the audit share
        weights = stratum_weights(is_audit, chosen.n_candidates)
        parts.append((signals[known], disagrees[known], weights[known], is_audit[known]))
    if not parts:
        return LabelledStates(np.empty((0, 3)), np.empty(0, bool), np.empty(0), np.empty(0, bool))
    return LabelledStates(*(np.concatenate(column) for column in zip(*parts, strict=True)))
