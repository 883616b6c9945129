"""Store access for the sampler: request a ranking, store its selection, read it back."""

from __future__ import annotations

import io
import secrets
from collections.abc import Callable
from dataclasses import asdict
from typing import Any

import numpy as np
from sqlalchemy import delete, exists, func, insert, select
from sqlalchemy.orm import Session

from ..db import write_transaction
from ..errors import Conflict, InvalidInput, NotFound
from ..ingest.models import Rollout, Step
from ..jobs import service as jobs_service
from ..jobs.models import Job
from ..loops.models import Loop, Round
from ..loops.spec import spec_of
from ..queue.models import Label
from ..shared import training_set
from .models import SelectedState, Selection
from .rank import Ranking, RankParams

RANK_JOB = "rank"

# Replaces a round's labelling queue with a stored selection, inside the caller's transaction
# (supplied by the queue stage, which comes after the sampler in the data flow).
FillQueue = Callable[[Session, Loop, Round, Selection], object]


def rank_params(
    loop: Loop, *, budget: int, seed: int | None, cutoff: training_set.Cutoff | None = None
) -> RankParams:
    """The ranking parameters from the loop's settings, with a recorded seed and cut-off."""
    s = spec_of(loop).settings
    return RankParams(
        budget=budget,
        seed=seed if seed is not None else secrets.randbits(63),
        min_gap_steps=s.min_gap_steps,
        audit_fraction=s.audit_fraction,
        spread=s.spread,
        stratify=s.stratify,
        uncertainty_weight=s.uncertainty_weight,
        novelty_weight=s.novelty_weight,
        novelty_k=s.novelty_k,
        takeover_window_s=s.takeover_window_s,
        takeover_boost=s.takeover_boost,
        uncertainty_method=s.uncertainty_method,
        self_tuning=s.self_tuning,
        tuning_min_disagreements=s.tuning_min_disagreements,
        tuning_effective_counts=True,
        search_by_candidates=True,
        one_vote_each=True,
        training_max_step_id=None if cutoff is None else cutoff.max_step_id,
        training_max_label_id=None if cutoff is None else cutoff.max_label_id,
    )


def _round_has_labels(session: Session, rnd: Round) -> bool:
    return bool(session.scalar(select(exists().where(Label.round_id == rnd.id))))


def request_ranking(
    session: Session, *, loop: Loop, rnd: Round, budget: int, seed: int | None, user_id: int | None
) -> Job:
    """Queue a ranking job for a round (409 while one runs or once labelling has begun)."""
    if rnd.number == 0:
        raise InvalidInput(
            "round 0 holds demonstrations, which are labels already; rank round 1 or later"
        )
    if budget < 1:
        raise InvalidInput("budget must be at least 1")
    has_steps = session.scalar(select(exists().where(Step.round_id == rnd.id)))
    if not has_steps:
        raise InvalidInput(f"round {rnd.number} has no rollouts yet; upload some first")
    if _round_has_labels(session, rnd):
        raise Conflict(
            f"round {rnd.number} already has labels; ranking it again would change its queue"
        )
    # pin the training set now: a job taken over later, or rerun, reads the same one
    cutoff = training_set.current_cutoff(session, loop=loop, up_to_round=rnd.number)
    params = rank_params(loop, budget=budget, seed=seed, cutoff=cutoff)
    return jobs_service.enqueue(
        session,
        kind=RANK_JOB,
        params=asdict(params),
        loop_id=loop.id,
        round_id=rnd.id,
        user_id=user_id,
    )


def _pack_scores(ranking: Ranking) -> bytes:
    sink = io.BytesIO()
    np.savez_compressed(
        sink,
        step_id=ranking.step_id,
        uncertainty=ranking.uncertainty.astype(np.float32),
        novelty=ranking.novelty.astype(np.float32),
        uncertainty_pct=ranking.uncertainty_pct.astype(np.float32),
        novelty_pct=ranking.novelty_pct.astype(np.float32),
        boost=ranking.boost.astype(np.float32),
        score=ranking.score.astype(np.float32),
        near_takeover=ranking.near_takeover.astype(bool),
        predicted=ranking.predicted.astype(np.float32),
    )
    return sink.getvalue()


def _nan_to_none(values: np.ndarray) -> list[float | None]:
    return [None if np.isnan(v) else float(v) for v in values.tolist()]


def store_ranking(
    session: Session,
    *,
    loop: Loop,
    rnd: Round,
    job_id: int | None,
    params: RankParams,
    ranking: Ranking,
    n_training: int,
    user_id: int | None,
    fill_queue: FillQueue,
    tuning: dict[str, Any] | None = None,
) -> Selection:
    """Replace the round's selection and queue with this ranking, in one transaction."""
    # SQLite: take the write lock first, so the checks below cannot go stale before the writes
    with write_transaction(session):
        if _round_has_labels(session, rnd):
            raise Conflict(f"round {rnd.number} already has labels; its queue is kept as it is")
        session.execute(delete(Selection).where(Selection.round_id == rnd.id))
        selection = Selection(
            round_id=rnd.id,
            job_id=job_id,
            budget=params.budget,
            seed=params.seed,
            params={
                **asdict(params),
                "methods": ranking.methods,
                "self_tuning": tuning or {"used": False, "why": "not fitted"},
                "notes": ranking.notes,
            },
            uncertainty_method=None
            if ranking.uncertainty_method == "novelty only"
            else ranking.uncertainty_method,
            n_candidates=len(ranking.step_id),
            n_training=n_training,
            candidate_scores=_pack_scores(ranking),
            created_by=user_id,
        )
        session.add(selection)
        session.flush()
        chosen = ranking.chosen
        uncertainty = _nan_to_none(ranking.uncertainty[chosen])
        novelty = _nan_to_none(ranking.novelty[chosen])
        rows = [
            {
                "selection_id": selection.id,
                "step_id": int(ranking.step_id[i]),
                "rank": int(rank),
                "reason": str(reason),
                "uncertainty": u,
                "novelty": 0.0 if n is None else n,
                "uncertainty_pct": None if u is None else float(ranking.uncertainty_pct[i]),
                "novelty_pct": float(ranking.novelty_pct[i]),
                "boost": float(ranking.boost[i]),
                "score": float(ranking.score[i]),
            }
            for i, rank, reason, u, n in zip(
                chosen.tolist(),
                ranking.ranks.tolist(),
                ranking.reasons.tolist(),
                uncertainty,
                novelty,
                strict=True,
            )
        ]
        if rows:
            session.execute(insert(SelectedState), rows)
        fill_queue(session, loop, rnd, selection)
    return selection


def get_selection(session: Session, *, rnd: Round) -> Selection:
    """The round's selection, or NotFound."""
    found = session.scalar(select(Selection).where(Selection.round_id == rnd.id))
    if found is None:
        raise NotFound(f"round {rnd.number} has not been ranked yet")
    return found


def selected_states(
    session: Session, *, selection: Selection, offset: int, limit: int
) -> tuple[list[dict[str, Any]], int]:
    """A page of the chosen states, in queue order, with their scores and reasons."""
    total = session.scalar(
        select(func.count())
        .select_from(SelectedState)
        .where(SelectedState.selection_id == selection.id)
    )
    rows = session.execute(
        select(SelectedState, Rollout.key, Step.step_index, Step.time_s)
        .join(Step, Step.id == SelectedState.step_id)
        .join(Rollout, Rollout.id == Step.rollout_id)
        .where(SelectedState.selection_id == selection.id)
        .order_by(SelectedState.id)
        .offset(offset)
        .limit(limit)
    ).all()
    items = [
        {
            "step_id": s.step_id,
            "rollout": key,
            "step": step_index,
            "time_s": time_s,
            "reason": s.reason,
            "rank": s.rank,
            "uncertainty": s.uncertainty,
            "novelty": s.novelty,
            "uncertainty_pct": s.uncertainty_pct,
            "novelty_pct": s.novelty_pct,
            "boost": s.boost,
            "score": s.score,
        }
        for s, key, step_index, time_s in rows
    ]
    return items, int(total or 0)


def candidate_scores(selection: Selection) -> dict[str, np.ndarray]:
    """Every candidate's scores as arrays (step_id, uncertainty, novelty, percentiles, score)."""
    if selection.candidate_scores is None:
        return {}
    with np.load(io.BytesIO(selection.candidate_scores), allow_pickle=False) as packed:
        return {name: packed[name] for name in packed.files}
