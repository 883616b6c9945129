"""Round reports: load a round's arrays from the store in bulk, then compute (``compute``).

Definitions (also in the README's report section)
--------------------------------------------------
- Expert answer on a state: the consensus of all its labels (``training_set.relabels``:
  majority vote with ties unresolved, or the per-dimension median for continuous actions).
- Audit and ranked samples: the round's selected states by ``SelectedState.reason``. Only the
  audit sample (uniform at random) estimates the learner's on-policy disagreement without
  bias; the ranked sample is chosen for being hard and is marked biased.
- Previous learner action: the learner's action at ``step_index - 1`` of the same rollout;
  first steps (and steps after one without a learner action) are left out of the split.
- Shift: the round's learner-controlled states against the training set up to the round
  before (``current_cutoff(up_to_round=round - 1)``), each side a seeded uniform subsample of
  at most ``MAX_SHIFT_SAMPLES`` states, standardised with the training sample's mean and
  standard deviation, unbiased MMD^2 with an RBF kernel whose bandwidth is the median
  pairwise distance of the pooled sample, and ``SHIFT_PERMUTATIONS`` permutations.
- Reports are computed on request; results are kept per process keyed by a fingerprint of
  everything they read (``ReportCache``), so an unchanged round is not recomputed.
"""

from __future__ import annotations

import hashlib
import json
import threading
from collections import OrderedDict
from typing import Any

import numpy as np
from sqlalchemy import and_, func, select
from sqlalchemy.orm import Session, aliased

from ..auth.models import User
from ..ingest.models import CONTROL_LEARNER, Rollout, Step
from ..loops import service as loops_service
from ..loops.models import Loop, Round
from ..loops.spec import LoopSpec, spec_of
from ..queue.models import ANSWER_UNSURE, Label
from ..sampler import history, tuning
from ..sampler.models import REASON_AUDIT, SelectedState, Selection
from ..shared import training_set as ts
from ..shared.consensus import one_vote_each
from ..shared.current import is_current
from ..shared.encode import FLOAT32_LE, stored_actions
from . import annotators, compute, rates
from .schemas import CountsRead, RoundReport, SelfTuningRead

MAX_SHIFT_SAMPLES = 1000
"""States drawn from each side for the shift test (memory and time grow with its square)."""
SHIFT_PERMUTATIONS = 200
"""Permutations of the MMD test: the smallest p-value it can give is 1/201."""
SHIFT_SEED = 20_240_611
"""Fixed seed: the same data always gives the same report. Combined with the round number."""
_CHUNK = 5_000


def _chunks(ids: np.ndarray) -> list[list[int]]:
    return [ids[i : i + _CHUNK].tolist() for i in range(0, len(ids), _CHUNK)]


def _actions(indexes: list[Any], vectors: list[Any], spec: LoopSpec) -> np.ndarray:
    return stored_actions(indexes, vectors, discrete=spec.is_discrete, width=spec.action_width)


def _step_actions(
    session: Session, step_ids: np.ndarray, spec: LoopSpec
) -> tuple[np.ndarray, np.ndarray]:
    """Learner action at each step and at the step before it in its rollout (id order in)."""
    previous = aliased(Step)
    rows: list[Any] = []
    for chunk in _chunks(step_ids):
        rows.extend(
            session.execute(
                select(
                    Step.id,
                    Step.learner_action,
                    Step.learner_action_vec,
                    previous.learner_action.label("before_action"),
                    previous.learner_action_vec.label("before_action_vec"),
                )
                .outerjoin(
                    previous,
                    and_(
                        previous.rollout_id == Step.rollout_id,
                        previous.step_index == Step.step_index - 1,
                    ),
                )
                .where(Step.id.in_(chunk))
            ).all()
        )
    order = {row.id: i for i, row in enumerate(rows)}
    rows = [rows[order[s]] for s in step_ids.tolist()]
    learner = _actions([r.learner_action for r in rows], [r.learner_action_vec for r in rows], spec)
    before = _actions([r.before_action for r in rows], [r.before_action_vec for r in rows], spec)
    return learner, before


def _expert(found: ts.Relabels, step_ids: np.ndarray, spec: LoopSpec) -> np.ndarray:
    """Consensus action of each step id; "none" where unlabelled or unresolved."""
    return history.expert_actions(
        found, step_ids, discrete=spec.is_discrete, width=spec.action_width
    )


def _features(session: Session, step_ids: np.ndarray, width: int) -> np.ndarray:
    """Float32 features of sorted step ids, shape (n, width)."""
    out = np.empty((len(step_ids), width), dtype=np.float32)
    at = 0
    for chunk in _chunks(step_ids):
        blobs = session.scalars(select(Step.features).where(Step.id.in_(chunk)).order_by(Step.id))
        block = np.frombuffer(b"".join(blobs), dtype=FLOAT32_LE).reshape(-1, width)
        out[at : at + len(block)] = block
        at += len(block)
    return out


def _subsample(ids: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    if len(ids) <= MAX_SHIFT_SAMPLES:
        return ids
    return np.sort(rng.choice(ids, MAX_SHIFT_SAMPLES, replace=False))


def _counts(session: Session, rnd: Round) -> dict[str, int]:
    by_control = dict(
        session.execute(
            select(Step.control, func.count()).where(Step.round_id == rnd.id).group_by(Step.control)
        ).all()
    )
    rollouts = (
        session.scalar(select(func.count()).select_from(Rollout).where(Rollout.round_id == rnd.id))
        or 0
    )
    learner = int(by_control.get(CONTROL_LEARNER, 0))
    states = int(sum(by_control.values()))
    return {"rollouts": int(rollouts), "states": states, "learner_states": learner}


def compute_round_report(
    session: Session, *, loop: Loop, number: int, training: ts.Members | None = None
) -> RoundReport:
    """Compute the report of one round from the store (no cache).

    `training`, when given, is the training set as it is now up to at least the round before
    this one (`_training_now`): the loop's reports take it from one read instead of one per
    round.
    """
    rnd = loops_service.get_round(session, loop=loop, number=number)
    spec = spec_of(loop)
    counts = _counts(session, rnd)
    found = ts.relabels(
        session,
        loop=loop,
        spec=spec,
        cutoff=ts.current_cutoff(session, loop=loop, up_to_round=number),
    )

    selected = session.execute(
        select(SelectedState.step_id, SelectedState.reason)
        .join(Selection, Selection.id == SelectedState.selection_id)
        .where(Selection.round_id == rnd.id)
        .order_by(SelectedState.step_id)
    ).all()
    selected_ids = np.array([r.step_id for r in selected], dtype=np.int64)
    is_audit = np.array([r.reason == REASON_AUDIT for r in selected], dtype=bool)
    learner, before = _step_actions(session, selected_ids, spec)
    expert = _expert(found, selected_ids, spec)
    samples = {
        reason: compute.sample_read(
            reason,
            compute.SampleArrays(learner[mask], expert[mask], before[mask]),
            spec,
            rates.MIN_AUDIT_LABELS,
        )
        for reason, mask in (("audit", is_audit), ("ranked", ~is_audit))
    }

    labels, names = _labels(session, rnd, found, spec)
    voted_states = np.bincount(labels.state[labels.voted()], minlength=len(labels.consensus))
    rng = np.random.default_rng([SHIFT_SEED, number])
    shift = _shift(session, loop=loop, rnd=rnd, rng=rng, training=training)
    return RoundReport(
        loop=loop.slug,
        round=number,
        learner_version=rnd.learner_version,
        status=rnd.status,
        action_kind=spec.kind,
        min_audit_labels=rates.MIN_AUDIT_LABELS,
        counts=CountsRead(
            **counts,
            expert_states=counts["states"] - counts["learner_states"],
            selected=len(selected_ids),
            selected_audit=int(is_audit.sum()),
            selected_ranked=int((~is_audit).sum()),
            labels=len(labels.annotator),
            unsure_labels=int((~labels.voted()).sum()),
            labelled_states=len(labels.consensus),
            multi_label_states=int((voted_states >= 2).sum()),
        ),
        audit=samples["audit"],
        ranked=samples["ranked"],
        shift=shift,
        agreement=annotators.agreement_read(labels, spec),
        annotators=annotators.annotators_read(labels, spec, names),
        pace=annotators.pace_read(labels),
        shown_vs_hidden=annotators.shown_hidden_read(labels, spec),
        self_tuning=_self_tuning(session, rnd, learner, expert, spec),
    )


def _self_tuning(
    session: Session,
    rnd: Round,
    learner: np.ndarray,
    expert: np.ndarray,
    spec: LoopSpec,
) -> SelfTuningRead | None:
    """The model the round's ranking fitted, and its calibration on the round's audit sample.

    ``learner`` and ``expert`` are the selected states' actions in step-id order, the order
    ``history.selection_states`` returns them in.
    """
    selection = session.scalar(select(Selection).where(Selection.round_id == rnd.id))
    record = None if selection is None else selection.params.get("self_tuning")
    if selection is None or not record:
        return None
    found: dict[str, Any] = {"used": bool(record.get("used")), "why": str(record.get("why", ""))}
    if "model" in record:
        model = tuning.DisagreementModel.from_record(record["model"])
        _, is_audit, signals = history.selection_states(session, selection)
        disagrees, known = tuning.disagreement_of(
            learner, expert, None if spec.is_discrete else spec.tolerance
        )
        audit = is_audit & known
        found |= {
            "intercept": model.intercept,
            "weights": model.weights,
            "n_labelled": model.n_labelled,
            "n_disagreements": model.n_disagreements,
            "effective_n": model.effective_n,
            "effective_disagreements": model.effective_disagreements,
            "effective_agreements": model.effective_agreements,
            "audit_calibration": tuning.calibration(
                model.predict(signals[audit]), disagrees[audit]
            ),
        }
    return SelfTuningRead.model_validate(found)


def _labels(
    session: Session, rnd: Round, found: ts.Relabels, spec: LoopSpec
) -> tuple[compute.LabelArrays, dict[int, str]]:
    rows = session.execute(
        select(
            Label.step_id,
            Label.user_id,
            Label.answer,
            Label.action,
            Label.action_vec,
            Label.learner_shown,
            Label.created_at,
            Label.span,
        )
        .where(Label.round_id == rnd.id, is_current())
        .order_by(Label.id)
    ).all()
    # each annotator's one vote on a state, as the training set counts it (a span copy beside
    # their own answer there does not vote)
    votes = one_vote_each(
        [r.step_id for r in rows], [r.user_id for r in rows], [bool(r.span) for r in rows]
    )
    rows = [r for r, vote in zip(rows, votes, strict=True) if vote]
    step_ids = np.array([r.step_id for r in rows], dtype=np.int64)
    states, state_index = np.unique(step_ids, return_inverse=True)
    unsure = np.array([r.answer == ANSWER_UNSURE for r in rows], dtype=bool)
    action = _actions([r.action for r in rows], [r.action_vec for r in rows], spec)
    action[unsure] = -1 if spec.is_discrete else np.nan
    learner, _ = _step_actions(session, states, spec)
    users = sorted({r.user_id for r in rows})
    names = dict(session.execute(select(User.id, User.name).where(User.id.in_(users))).all())
    labels = compute.LabelArrays(
        annotator=np.array([r.user_id for r in rows], dtype=np.int64),
        state=state_index.astype(np.int64).reshape(-1),
        action=action,
        created_s=np.array([r.created_at.timestamp() for r in rows], dtype=np.float64),
        learner_shown=np.array([bool(r.learner_shown) for r in rows], dtype=bool),
        learner_action=learner[state_index.reshape(-1)] if len(rows) else learner,
        consensus=_expert(found, states, spec),
    )
    return labels, {int(k): str(v) for k, v in names.items()}


def _training_now(session: Session, *, loop: Loop, up_to_round: int) -> ts.Members:
    """The training set as the store holds it now, rounds up to `up_to_round`. Its rows of
    rounds up to any earlier number are that round's training set: a state's consensus counts
    all of its labels, and labels belong to the state's round (training_set.current_cutoff)."""
    cutoff = ts.current_cutoff(session, loop=loop, up_to_round=up_to_round)
    return ts.members(session, loop=loop, spec=spec_of(loop), cutoff=cutoff)


def _shift(
    session: Session,
    *,
    loop: Loop,
    rnd: Round,
    rng: np.random.Generator,
    training: ts.Members | None = None,
) -> Any:
    spec = spec_of(loop)
    names = list(spec.feature_names)
    units = list(spec.feature_units)
    if rnd.number == 0:
        training_ids = np.zeros(0, np.int64)
    else:
        if training is None:
            training = _training_now(session, loop=loop, up_to_round=rnd.number - 1)
        training_ids = training.step_id[training.round <= rnd.number - 1]
    visited_ids = np.array(
        session.scalars(
            select(Step.id)
            .where(Step.round_id == rnd.id, Step.control == CONTROL_LEARNER)
            .order_by(Step.id)
        ).all(),
        dtype=np.int64,
    )
    # subsample by id first so that only the drawn states' features are read
    training_sample = _subsample(training_ids, rng)
    visited_sample = _subsample(visited_ids, rng)
    return compute.shift_read(
        _features(session, training_sample, len(names)),
        _features(session, visited_sample, len(names)),
        n_training=len(training_ids),
        n_round=len(visited_ids),
        feature_names=names,
        feature_units=units,
        n_permutations=SHIFT_PERMUTATIONS,
        rng=rng,
    )


# --- reports on request, kept while their inputs do not change --------------------------------


class ReportCache:
    """Computed reports by fingerprint, least recently used dropped first; thread-safe.

    One per app process (``app.state.report_cache``). A fingerprint covers everything a report
    reads, so a stale entry is never served: it simply stops being asked for.
    """

    def __init__(self, max_entries: int = 256) -> None:
        self._entries: OrderedDict[str, RoundReport] = OrderedDict()
        self._lock = threading.Lock()
        self.max_entries = max_entries

    def get(self, key: str) -> RoundReport | None:
        with self._lock:
            found = self._entries.get(key)
            if found is not None:
                self._entries.move_to_end(key)
            return found

    def put(self, key: str, report: RoundReport) -> None:
        with self._lock:
            self._entries[key] = report
            self._entries.move_to_end(key)
            while len(self._entries) > self.max_entries:
                self._entries.popitem(last=False)


def _fingerprints(session: Session, *, loop: Loop) -> dict[int, str]:
    """A hash per round of what its report reads: the loop's spec, its own rows and selection,
    and the steps and labels of every earlier round (the training set it is compared with)."""
    rounds = session.execute(
        select(Round.id, Round.number, Round.status, Round.learner_version)
        .where(Round.loop_id == loop.id)
        .order_by(Round.number)
    ).all()
    ids = [r.id for r in rounds]

    def grouped(column: Any, key: Any, *joins: Any) -> dict[int, tuple[int, int]]:
        query = select(
            key.label("round_id"), func.count().label("n"), func.max(column).label("last_id")
        )
        for target, on in joins:
            query = query.join(target, on)
        rows = session.execute(query.where(key.in_(ids)).group_by(key)).all()
        return {int(r.round_id): (int(r.n), int(r.last_id or 0)) for r in rows}

    steps = grouped(Step.id, Step.round_id)
    labels = grouped(Label.id, Label.round_id)
    chosen = grouped(
        SelectedState.id,
        Selection.round_id,
        (SelectedState, SelectedState.selection_id == Selection.id),
    )
    # the stored JSON as it is: any change to the spec gives new fingerprints
    stored_spec = json.dumps([loop.features, loop.action_space, loop.settings], sort_keys=True)
    prints: dict[int, str] = {}
    digest = hashlib.sha256(stored_spec.encode())
    for round_id, number, status, version in rounds:
        digest.update(repr((number, steps.get(round_id), labels.get(round_id))).encode())
        own = digest.copy()
        own.update(repr((status, version, chosen.get(round_id), SHIFT_SEED)).encode())
        prints[number] = own.hexdigest()
    return prints


def round_report(
    session: Session, *, loop: Loop, number: int, cache: ReportCache | None = None
) -> RoundReport:
    """The report of one round, from the cache when its inputs are unchanged."""
    loops_service.get_round(session, loop=loop, number=number)  # NotFound for a wrong number
    if cache is None:
        return compute_round_report(session, loop=loop, number=number)
    key = f"{loop.id}:{number}:{_fingerprints(session, loop=loop)[number]}"
    found = cache.get(key)
    if found is None:
        found = compute_round_report(session, loop=loop, number=number)
        cache.put(key, found)
    return found


def loop_reports(
    session: Session, *, loop: Loop, cache: ReportCache | None = None
) -> list[RoundReport]:
    """Reports of every round of a loop, oldest first."""
    prints = _fingerprints(session, loop=loop)
    reports = []
    # read once for every round that is not cached: each round's report compares its states with
    # the training set before it, and rebuilding that per round made a loop's reports quadratic
    # in its rounds (60 rounds: thousands of page queries)
    training: ts.Members | None = None
    for number, fingerprint in prints.items():
        key = f"{loop.id}:{number}:{fingerprint}"
        found = cache.get(key) if cache is not None else None
        if found is None:
            if training is None:
                training = _training_now(session, loop=loop, up_to_round=max(prints))
            found = compute_round_report(session, loop=loop, number=number, training=training)
            if cache is not None:
                cache.put(key, found)
        reports.append(found)
    return reports
