"""Store access for loops and rounds."""

from __future__ import annotations

from functools import cache

from sqlalchemy import Select, bindparam, func, select
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from ..errors import Conflict, InvalidInput, NotFound
from ..ingest.models import Rollout
from ..limits import shown
from ..models import utcnow
from .log_mapping import LogMapping, check_against_loop
from .models import Loop, Round
from .schemas import LoopCreate, RoundRead

DEMONSTRATION_VERSION = "demonstrations"


def create_loop(session: Session, *, spec: LoopCreate, user_id: int | None) -> Loop:
    """Create a loop and its round 0 (seed demonstrations)."""
    if session.scalar(select(Loop.id).where(Loop.slug == spec.slug)) is not None:
        raise Conflict(f"a loop with slug '{spec.slug}' already exists")
    loop = Loop(
        slug=spec.slug,
        title=spec.title,
        features=[f.model_dump() for f in spec.features],
        action_space=spec.action_space.model_dump(),
        settings=spec.settings.model_dump(),
        log_mapping=None if spec.log_mapping is None else spec.log_mapping.model_dump(),
        created_by=user_id,
    )
    try:
        # a savepoint: a refused insert leaves the caller's transaction as it was
        with session.begin_nested():
            session.add(loop)
    except IntegrityError as exc:  # a concurrent create with the same slug
        raise Conflict(f"a loop with slug '{spec.slug}' already exists") from exc
    session.add(
        Round(loop_id=loop.id, number=0, learner_version=DEMONSTRATION_VERSION, opened_by=user_id)
    )
    session.flush()
    return loop


def list_loops(session: Session) -> list[Loop]:
    """All loops, oldest first."""
    return list(session.scalars(select(Loop).order_by(Loop.id)))


def get_loop(session: Session, *, slug: str) -> Loop:
    """The loop with this slug, or NotFound."""
    loop = session.scalar(_loop_by_slug(), {"slug": slug})
    if loop is None:
        raise NotFound(f"no loop with slug '{shown(slug)}'")
    return loop


@cache
def _loop_by_slug() -> Select[Loop]:
    """The loop named :slug; built once, as every request whose path names a loop runs it
    (building the statement cost about as much as running it)."""
    return select(Loop).where(Loop.slug == bindparam("slug"))


def set_log_mapping(session: Session, *, loop: Loop, mapping: LogMapping) -> Loop:
    """Give the loop a log mapping, or replace its mapping: checked against the loop's features
    and action space exactly as in a new loop's spec, refused (422) before anything is written.
    Logs already stored keep the steps they were read into."""
    try:
        check_against_loop(mapping, loop.features, loop.action_space)
    except ValueError as exc:
        raise InvalidInput(str(exc)) from exc
    loop.log_mapping = mapping.model_dump()
    session.flush()
    return loop


def get_round(session: Session, *, loop: Loop, number: int) -> Round:
    """Round `number` of a loop, or NotFound."""
    found = session.scalar(select(Round).where(Round.loop_id == loop.id, Round.number == number))
    if found is None:
        raise NotFound(f"loop '{loop.slug}' has no round {number}")
    return found


def open_round(session: Session, *, loop: Loop, learner_version: str, user_id: int | None) -> Round:
    """Open the next round, recording the learner version whose rollouts it will hold."""
    last = session.scalar(select(func.max(Round.number)).where(Round.loop_id == loop.id)) or 0
    new = Round(
        loop_id=loop.id, number=last + 1, learner_version=learner_version, opened_by=user_id
    )
    try:
        # a savepoint: a refused insert leaves the caller's transaction as it was
        with session.begin_nested():
            session.add(new)
    except IntegrityError as exc:
        raise Conflict(f"round {last + 1} of '{loop.slug}' was opened concurrently") from exc
    return new


def close_round(session: Session, *, loop: Loop, number: int) -> Round:
    """Close a round: it takes no more uploads. Closing twice is harmless."""
    rnd = get_round(session, loop=loop, number=number)
    if rnd.status != "closed":
        rnd.status = "closed"
        rnd.closed_at = utcnow()
        session.flush()
    return rnd


def round_summaries(session: Session, *, loop: Loop) -> list[RoundRead]:
    """Rounds of a loop with their rollout and step counts, in two grouped queries."""
    rounds = list(
        session.scalars(select(Round).where(Round.loop_id == loop.id).order_by(Round.number))
    )
    ids = [r.id for r in rounds]
    rollout_counts = dict(
        session.execute(
            select(Rollout.round_id, func.count())
            .where(Rollout.round_id.in_(ids))
            .group_by(Rollout.round_id)
        ).all()
    )
    step_counts = dict(
        session.execute(
            select(Rollout.round_id, func.coalesce(func.sum(Rollout.n_steps), 0))
            .where(Rollout.round_id.in_(ids))
            .group_by(Rollout.round_id)
        ).all()
    )
    return [
        RoundRead(
            number=r.number,
            learner_version=r.learner_version,
            status=r.status,
            opened_at=r.opened_at,
            closed_at=r.closed_at,
            rollouts=int(rollout_counts.get(r.id, 0)),
            steps=int(step_counts.get(r.id, 0)),
        )
        for r in rounds
    ]
