"""The ranking job: load the round and the training set, rank, store the selection and queue."""

from __future__ import annotations

from typing import Any

import numpy as np

from app.errors import NotFound
from app.jobs.runner import JobContext, handler
from app.loops.models import Loop, Round
from app.sampler import service
from app.sampler.candidates import load_round_steps
from app.sampler.rank import RankParams, rank_round
from app.snapshots import training_set


@handler(service.RANK_JOB)
def rank_job(ctx: JobContext) -> dict[str, Any]:
    """Deterministic given the recorded params: a rerun after a crash gives the same selection."""
    params = RankParams(**ctx.job.params)
    with ctx.session_factory() as session:
        rnd = session.get(Round, ctx.job.round_id)
        loop = session.get(Loop, ctx.job.loop_id)
        if rnd is None or loop is None:
            raise NotFound("the round of this ranking job no longer exists")
        ctx.progress(0.02, force=True)
        steps = load_round_steps(session, loop=loop, rnd=rnd)
        cutoff = training_set.current_cutoff(session, loop=loop, up_to_round=rnd.number)
        _, training = training_set.training_features(session, loop=loop, cutoff=cutoff)
        # End the read transaction: on SQLite a transaction whose snapshot predates another
        # connection's write (our own heartbeats) may not write later.
        session.commit()
        ctx.progress(0.25, force=True)
        space = loop.action_space
        if space["kind"] == "continuous":
            low = np.array([d["low"] for d in space["dimensions"]], dtype=np.float64)
            high = np.array([d["high"] for d in space["dimensions"]], dtype=np.float64)
        else:
            low = high = np.empty(0)
        ranking = rank_round(
            steps,
            training,
            kind=space["kind"],
            low=low,
            high=high,
            params=params,
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
        )
        return {
            "selection_id": selection.id,
            "chosen": int(len(ranking.chosen)),
            "audit": int((ranking.reasons == "audit").sum()),
            "candidates": int(len(ranking.step_id)),
            "training_states": int(len(training)),
            "uncertainty_method": ranking.uncertainty_method,
            "notes": ranking.notes,
        }
