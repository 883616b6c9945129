"""Continuous actions: tolerance disagreement, mean absolute error, interval alpha per dimension.

Expected values come from the test's own record via numpy, scikit-learn, statsmodels and the
krippendorff package; the source is named beside each check.
"""

from __future__ import annotations

from collections import defaultdict

import krippendorff
import numpy as np
import pytest
from numpy.testing import assert_allclose
from sklearn.metrics import mean_absolute_error
from statsmodels.stats.proportion import proportion_confint

from expertloop.loops import service as loops_service
from expertloop.reports import service
from tests.helpers import CONTINUOUS_SPEC
from tests.reports import builders

TOLERANCE = np.array([0.1, 0.02])  # the loop setting, in m/s and 1/m
LOW, HIGH = np.array([0.0, -0.2]), np.array([2.0, 0.2])


@pytest.fixture
def world(app, client, admin, uploader, make_user):
    rng = np.random.default_rng(5)
    spec = dict(CONTINUOUS_SPEC, settings={"continuous_tolerance": TOLERANCE.tolist()})
    slug = builders.create_loop(client, admin, spec)
    builders.open_round(client, admin, slug, "g1")
    names = ["c-ann-a", "c-ann-b", "c-ann-c"]
    for name in names:
        make_user("annotator", name=name)
    users = builders.user_ids(app, names)

    def actions(shape):  # float32 from the start, so the store holds exactly these values
        return rng.uniform(LOW, HIGH, size=(*shape, 2)).astype(np.float32).astype(np.float64)

    keys0 = builders.upload_round(
        client, uploader, slug=slug, number=0, features=rng.normal(size=(5, 8, 2)),
        actions=actions((5, 8)), action_names=None, prefix="cd",
    )  # fmt: skip
    learner = actions((15, 8))
    learner[:, 1::2] = learner[:, 0::2]  # the learner holds its command for two steps
    keys1 = builders.upload_round(
        client, uploader, slug=slug, number=1, features=rng.normal(size=(15, 8, 2)),
        actions=learner, action_names=None, prefix="cr",
    )  # fmt: skip
    builders.step_ids(app, slug, keys0, 8)
    grid = builders.step_ids(app, slug, keys1, 8)
    flat = grid.reshape(-1)
    order = rng.permutation(len(flat))
    audit, ranked = [int(s) for s in flat[order[:60]]], [int(s) for s in flat[order[60:80]]]
    learner_of = {int(grid[r, s]): learner[r, s] for r in range(15) for s in range(8)}
    previous = {
        int(grid[r, s]): learner[r, s - 1] if s else np.full(2, np.nan)
        for r in range(15)
        for s in range(8)
    }
    votes = []  # (step, annotator, vector or None for unsure)
    for step in audit + ranked:
        off = rng.random() < 0.4
        truth = learner_of[step] + (rng.normal(0, [0.3, 0.05]) if off else 0.0)
        who = rng.choice(names, size=int(rng.integers(2, 4)), replace=False)
        for name in who:
            vote = np.clip(truth + rng.normal(0, [0.03, 0.006]), LOW, HIGH)
            vote = vote.astype(np.float32).astype(np.float64)
            votes.append((step, str(name), None if rng.random() < 0.05 else vote))
    builders.add_selection_and_labels(
        app,
        slug=slug,
        number=1,
        audit=audit,
        ranked=ranked,
        shown=set(ranked),
        labels=[
            builders.LabelSpec(
                step_id=s,
                user_id=users[a],
                vector=None if v is None else v.tolist(),
                unsure=v is None,
                at=t,
            )
            for (s, a, v), t in zip(votes, builders.every(25.0, len(votes)), strict=True)
        ],
    )
    with app.state.session_factory() as session:
        loop = loops_service.get_loop(session, slug=slug)
        report = service.round_report(session, loop=loop, number=1)
    return report, audit, learner_of, previous, votes


def _medians(votes):
    by_step = defaultdict(list)
    for step, _, vector in votes:
        if vector is not None:
            by_step[step].append(vector)
    # consensus of continuous labels: per-dimension median (numpy median)
    return {s: np.median(np.array(v), axis=0) for s, v in by_step.items()}


def test_tolerance_disagreement_and_mean_absolute_error(world):
    report, audit, learner_of, previous, votes = world
    median = _medians(votes)
    compared = [s for s in audit if s in median]
    differs = [bool(np.any(np.abs(learner_of[s] - median[s]) > TOLERANCE)) for s in compared]
    read = report.audit.disagreement
    assert (read.count, read.n) == (sum(differs), len(compared))
    # statsmodels proportion_confint(method='wilson')
    lower, upper = proportion_confint(sum(differs), len(compared), method="wilson")
    assert_allclose([read.rate, read.lower, read.upper], [np.mean(differs), lower, upper])
    # sklearn mean_absolute_error per output dimension
    expected = mean_absolute_error(
        np.array([median[s] for s in compared]),
        np.array([learner_of[s] for s in compared]),
        multioutput="raw_values",
    )
    assert_allclose(read.mean_absolute_error, expected, rtol=1e-9)
    # split: the expert differs from the previous learner action beyond the tolerance
    with_previous = [s for s in compared if not np.isnan(previous[s]).any()]
    changed = [s for s in with_previous if np.any(np.abs(median[s] - previous[s]) > TOLERANCE)]
    assert report.audit.changed.n == len(changed)
    assert report.audit.unchanged.n == len(with_previous) - len(changed)
    assert report.audit.changed.count == sum(
        bool(np.any(np.abs(learner_of[s] - median[s]) > TOLERANCE)) for s in changed
    )


def test_interval_alpha_per_dimension_matches_krippendorff(world):
    report, _, _, _, votes = world
    by_step = defaultdict(dict)
    for step, name, vector in votes:
        if vector is not None:
            by_step[step][name] = vector
    states = sorted(s for s, got in by_step.items() if len(got) >= 2)
    names = sorted({n for s in states for n in by_step[s]})
    alphas = report.agreement.krippendorff
    assert [a.dimension for a in alphas] == ["speed_cmd", "curvature"]
    assert report.agreement.cohen_kappa is None and report.agreement.fleiss_kappa is None
    for d, read in enumerate(alphas):
        matrix = np.full((len(names), len(states)), np.nan)
        for j, s in enumerate(states):
            for name, vector in by_step[s].items():
                matrix[names.index(name), j] = vector[d]
        # krippendorff package, interval level, coders x units
        expected = krippendorff.alpha(reliability_data=matrix, level_of_measurement="interval")
        assert read.level == "interval"
        assert_allclose(read.alpha, expected, rtol=1e-9)


def test_annotator_agreement_within_tolerance_of_the_median(world):
    report, _, _, _, votes = world
    median = _medians(votes)
    counted = defaultdict(int)
    voters = defaultdict(set)
    for step, name, vector in votes:
        if vector is not None:
            voters[step].add(name)
    for step, name, vector in votes:
        if vector is not None and len(voters[step]) >= 2:
            counted[name, "n"] += 1
            # a vote agrees when every dimension is within the loop's tolerance (common practice)
            counted[name, "k"] += int(np.all(np.abs(vector - median[step]) <= TOLERANCE))
    for row in report.annotators:
        assert (row.compared, row.agreeing) == (counted[row.name, "n"], counted[row.name, "k"])
        # pace: labels after the first over the span of the annotator's labels, all gaps
        # being under the 15-minute idle limit (common practice arithmetic)
        mine = [i for i, (_, name, _) in enumerate(votes) if name == row.name]
        span_hours = 25.0 * (mine[-1] - mine[0]) / 3600  # labels are written 25 s apart
        assert row.labels == len(mine)
        assert row.labels_per_hour == pytest.approx((len(mine) - 1) / span_hours)


def test_round_zero_and_the_page_of_a_continuous_loop(app, client, world, make_user):
    with app.state.session_factory() as session:
        loop = loops_service.get_loop(session, slug="aisle-speed")
        zero = service.round_report(session, loop=loop, number=0)
    assert zero.counts.labels == 0 and zero.annotators == []
    assert [a.alpha for a in zero.agreement.krippendorff] == [None, None]
    reader = make_user("trainer", name="c-reader")
    response = client.get("/loops/aisle-speed", headers=reader)
    assert response.status_code == 200
    assert "α speed_cmd" in response.text and "α curvature" in response.text
    table = client.get("/api/loops/aisle-speed/report", headers=reader).json()["items"]
    alphas = [a.alpha for a in world[0].agreement.krippendorff]
    assert table[1]["krippendorff_alpha"] == min(alphas)  # the weakest dimension
