"""The ranking job: load the round and the training set, rank, store the selection, queue it."""

from __future__ import annotations

from dataclasses import replace
from typing import Any

from sqlalchemy.orm import Session

from ..errors import NotFound
from ..jobs.runner import JobContext
from ..loops.models import Loop, Round
from ..loops.spec import spec_of
from ..shared import training_set
from ..shared.training_set import Cutoff
from . import history, service, tuning
from .candidates import load_round_steps
from .rank import RankParams, rank_round


def pinned_cutoff(session: Session, *, loop: Loop, rnd: Round, params: RankParams) -> Cutoff:
    """The training set as it was when the ranking was requested (jobs queued before the
    cut-off was recorded read the current one)."""
    if params.training_max_step_id is None or params.training_max_label_id is None:
        current = training_set.current_cutoff(session, loop=loop, up_to_round=rnd.number)
        return replace(current, one_vote_each=params.one_vote_each)
    return Cutoff(
        rnd.number,
        params.training_max_step_id,
        params.training_max_label_id,
        one_vote_each=params.one_vote_each,
    )


def tune(
    session: Session, *, loop: Loop, rnd: Round, params: RankParams, cutoff: Cutoff
) -> tuple[tuning.DisagreementModel | None, dict[str, Any]]:
    """Fit the disagreement model on earlier rounds' labels; the model to rank by, and a record.

    The model ranks the round only with enough disagreements and agreements behind it; the
    record says which, and why.
    """
    if not params.self_tuning:
        return None, {"used": False, "why": "self-tuning is switched off for this loop"}
    found = history.labelled_states(session, loop=loop, before_round=rnd.number, cutoff=cutoff)
    if len(found) == 0:
        return None, {"used": False, "why": "no labelled states in earlier rounds yet"}
    model = tuning.fit_disagreement_model(found.signals, found.disagrees, found.weights)
    used = tuning.enough_to_rank(
        model, params.tuning_min_disagreements, effective=params.tuning_effective_counts
    )
    counted = "effective " if params.tuning_effective_counts else ""
    why = (
        "ranked by the predicted probability of disagreement"
        if used
        else f"fewer than {params.tuning_min_disagreements} {counted}disagreements or agreements "
        "among labelled states: ranked by the weighted mean"
    )
    audit = found.is_audit
    in_sample = tuning.calibration(model.predict(found.signals[audit]), found.disagrees[audit])
    return (model if used else None), {
        "used": used,
        "why": why,
        "model": model.record(),
        "fit_audit_calibration": in_sample,
    }


def rank_job(ctx: JobContext, *, fill_queue: service.FillQueue) -> dict[str, Any]:
    """Deterministic given the recorded params: a rerun after a crash gives the same selection.

    `fill_queue` replaces the round's labelling queue with the selection, in the same
    transaction (the queue stage supplies it; app/job_handlers.py puts the two together).
    """
    params = RankParams(**ctx.job.params)
    with ctx.session_factory() as session:
        rnd = session.get(Round, ctx.job.round_id)
        loop = session.get(Loop, ctx.job.loop_id)
        if rnd is None or loop is None:
            raise NotFound("the round of this ranking job no longer exists")
        ctx.progress(0.02, force=True)
        steps = load_round_steps(session, loop=loop, rnd=rnd)
        cutoff = pinned_cutoff(session, loop=loop, rnd=rnd, params=params)
        spec = spec_of(loop)
        _, training = training_set.training_features(session, loop=loop, spec=spec, cutoff=cutoff)
        model, tuning_record = tune(session, loop=loop, rnd=rnd, params=params, cutoff=cutoff)
        # End the read transaction: on SQLite a transaction whose snapshot predates another
        # connection's write (our own heartbeats) may not write later.
        session.commit()
        ctx.progress(0.25, force=True)
        ranking = rank_round(
            steps,
            training,
            kind=spec.kind,
            low=spec.low,
            high=spec.high,
            params=params,
            model=model,
            progress=lambda f: ctx.progress(0.25 + 0.65 * f),
        )
        ctx.progress(0.92, force=True)
        selection = service.store_ranking(
            session,
            loop=loop,
            rnd=rnd,
            job_id=ctx.job.id,
            params=params,
            ranking=ranking,
            n_training=len(training),
            user_id=ctx.job.created_by,
            tuning=tuning_record,
            fill_queue=fill_queue,
        )
        return {
            "selection_id": selection.id,
            "chosen": int(len(ranking.chosen)),
            "audit": int((ranking.reasons == "audit").sum()),
            "candidates": int(len(ranking.step_id)),
            "training_states": int(len(training)),
            "uncertainty_method": ranking.uncertainty_method,
            "methods": ranking.methods,
            "self_tuning": {k: v for k, v in tuning_record.items() if k in ("used", "why")},
            "notes": ranking.notes,
        }
