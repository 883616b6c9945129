"""Round report values against reference libraries computed from the test's own record.

The sources are named beside each check. Expected values never come from app.reports.
"""

from __future__ import annotations

import html
from collections import Counter, defaultdict

import krippendorff
import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy.spatial.distance import pdist
from sklearn.metrics import cohen_kappa_score
from sklearn.metrics.pairwise import rbf_kernel
from statsmodels.stats.inter_rater import aggregate_raters, fleiss_kappa
from statsmodels.stats.proportion import confint_proportions_2indep, proportion_confint

from expertloop.loops import service as loops_service
from expertloop.reports import service
from tests.helpers import DISCRETE_SPEC
from tests.reports import builders
from tests.reports.scenario import ANNOTATORS, BREAK_AFTER, SECONDS_APART, build_discrete


def _report(app, slug, number=1):
    with app.state.session_factory() as session:
        loop = loops_service.get_loop(session, slug=slug)
        return service.round_report(session, loop=loop, number=number)


def _check_rate(rate, k, n):
    """Rate and Wilson 95% limits against statsmodels proportion_confint(method='wilson')."""
    assert (rate.count, rate.n) == (k, n)
    if n < 30:  # MIN_AUDIT_LABELS: no rate is quoted below it
        assert not rate.quoted and rate.rate is None and "too few" in rate.note
        return
    lower, upper = proportion_confint(k, n, alpha=0.05, method="wilson")
    assert rate.quoted
    assert_allclose([rate.rate, rate.lower, rate.upper], [k / n, lower, upper], rtol=1e-12)


@pytest.fixture(params=["two", "three", "varied"])
def world(request, app, client, admin, uploader, make_user):
    return build_discrete(app, client, admin, uploader, make_user, mode=request.param)


def test_disagreement_and_its_split_match_statsmodels_wilson(app, world):
    report = _report(app, world.slug)
    consensus = world.consensus()
    for sample, steps in (("audit", world.audit), ("ranked", world.ranked)):
        read = getattr(report, sample)
        compared = [s for s in steps if s in consensus]
        differs = [world.learner[s] != consensus[s] for s in compared]
        _check_rate(read.disagreement, sum(differs), len(compared))
        assert read.disagreement.n_excluded == len(steps) - len(compared)
        # split by whether the expert's answer differs from the learner's previous action
        with_previous = [s for s in compared if world.previous[s] >= 0]
        changed = [s for s in with_previous if consensus[s] != world.previous[s]]
        kept = [s for s in with_previous if consensus[s] == world.previous[s]]
        _check_rate(
            read.changed, sum(world.learner[s] != consensus[s] for s in changed), len(changed)
        )
        _check_rate(read.unchanged, sum(world.learner[s] != consensus[s] for s in kept), len(kept))
        assert read.biased == (sample == "ranked")
    assert report.audit.disagreement.quoted  # the scenario has enough audit labels
    assert report.counts.selected_audit == len(world.audit)
    assert report.counts.labels == len(world.votes)


def _direct_unbiased_mmd2(x, y, bandwidth):
    # Gretton et al. 2012, Lemma 6 (docs/references.md, "Squared MMD with an RBF kernel"), with
    # sklearn's rbf_kernel and
    # gamma = 1 / (2 l^2); the within-sample sums leave out i == j.
    kxx = rbf_kernel(x, x, gamma=1 / (2 * bandwidth**2))
    kyy = rbf_kernel(y, y, gamma=1 / (2 * bandwidth**2))
    kxy = rbf_kernel(x, y, gamma=1 / (2 * bandwidth**2))
    m, n = len(x), len(y)
    return (
        (kxx.sum() - np.trace(kxx)) / (m * (m - 1))
        + (kyy.sum() - np.trace(kyy)) / (n * (n - 1))
        - 2 * kxy.mean()
    )


def test_shift_matches_direct_mmd_and_cohens_d(app, client, admin, uploader, make_user):
    world = build_discrete(app, client, admin, uploader, make_user, mode="two")
    shift = _report(app, world.slug).shift
    x, y = world.demo_features, world.round_features
    # standardised with the training set's mean and (population) standard deviation
    centre, scale = x.mean(axis=0), x.std(axis=0)
    xs, ys = (x - centre) / scale, (y - centre) / scale
    # median of scipy pdist over the pooled sample
    # (docs/references.md, "Median heuristic bandwidth")
    bandwidth = np.median(pdist(np.vstack([xs, ys])))
    assert (shift.n_training, shift.n_round) == (60, 200)
    assert (shift.n_training_sample, shift.n_round_sample) == (60, 200)  # under the cap
    assert_allclose(shift.bandwidth, bandwidth, rtol=1e-9)
    assert_allclose(shift.mmd2, _direct_unbiased_mmd2(xs, ys, bandwidth), rtol=1e-7)
    # a 1.5-sd mean shift in one feature: no permutation of 200 reaches it, so p = 1/201,
    # the smallest value the permutation p-value (1 + count) / (1 + 200) can take
    assert shift.p_value == pytest.approx(1 / 201)
    # Cohen's d with a pooled ddof=1 standard deviation (common practice), gap_m first
    pooled = np.sqrt(((59) * x.var(axis=0, ddof=1) + 199 * y.var(axis=0, ddof=1)) / 258)
    d = (y.mean(axis=0) - x.mean(axis=0)) / pooled
    assert shift.features[0].name == "gap_m" and shift.features[0].unit == "m"
    by_name = {f.name: f.smd for f in shift.features}
    assert_allclose([by_name[n] for n in ("gap_m", "speed", "occluded")], d, rtol=1e-9)
    assert_allclose(shift.features[0].mean_round, y[:, 0].mean(), rtol=1e-9)
    # the same data always gives the same report (fixed seed)
    assert _report(app, world.slug).shift == shift


def _multi_vote_matrix(world):
    """Annotator x state matrix of real votes on states with at least two votes."""
    votes = defaultdict(dict)
    for v in world.votes:
        if v.action >= 0:
            votes[v.step][v.annotator] = v.action
    states = sorted(s for s, got in votes.items() if len(got) >= 2)
    names = sorted({a for s in states for a in votes[s]})
    matrix = np.full((len(names), len(states)), np.nan)
    for j, s in enumerate(states):
        for a, action in votes[s].items():
            matrix[names.index(a), j] = action
    return names, states, matrix


def test_annotator_agreement_matches_reference_libraries(app, world):
    agreement = _report(app, world.slug).agreement
    names, states, matrix = _multi_vote_matrix(world)
    assert (agreement.n_states, agreement.n_annotators) == (len(states), len(names))
    # krippendorff package, nominal level, coders x units
    # (docs/references.md, "Krippendorff's alpha")
    expected_alpha = krippendorff.alpha(reliability_data=matrix, level_of_measurement="nominal")
    assert_allclose(agreement.krippendorff[0].alpha, expected_alpha, rtol=1e-9)
    assert agreement.krippendorff[0].level == "nominal"
    if len(names) == 2:  # scenario "two": Cohen's kappa by sklearn cohen_kappa_score
        assert_allclose(agreement.cohen_kappa, cohen_kappa_score(matrix[0], matrix[1]), rtol=1e-9)
    else:
        assert agreement.cohen_kappa is None
    per_state = (~np.isnan(matrix)).sum(axis=0)
    if np.all(per_state == per_state[0]):  # statsmodels fleiss_kappa on aggregate_raters
        table, _ = aggregate_raters(matrix.T.astype(int), n_cat=3)
        assert_allclose(agreement.fleiss_kappa, fleiss_kappa(table), rtol=1e-9)
    else:
        assert agreement.fleiss_kappa is None


def test_annotators_agreement_with_consensus_and_pace(app, world):
    report = _report(app, world.slug)
    consensus = world.consensus()
    _, states, _ = _multi_vote_matrix(world)
    multi = set(states)
    rows = {a.name: a for a in report.annotators}
    for name in ANNOTATORS:
        mine = [v for v in world.votes if v.annotator == name]
        if not mine:
            assert name not in rows
            continue
        compared = [v for v in mine if v.action >= 0 and v.step in multi and v.step in consensus]
        agreeing = sum(v.action == consensus[v.step] for v in compared)
        row = rows[name]
        # agreement with consensus: share of votes equal to the majority (common practice)
        assert (row.labels, row.compared, row.agreeing) == (len(mine), len(compared), agreeing)
        if compared:
            assert row.agreement == pytest.approx(agreeing / len(compared))
        # pace: gaps of at most 15 minutes are working time (common practice arithmetic);
        # labels are SECONDS_APART apart, ann-a's one break is left out with the label after it
        timed = len(mine) - 1 - (1 if name == "ann-a" and len(mine) > BREAK_AFTER else 0)
        if timed:
            assert row.labels_per_hour == pytest.approx(3600 / SECONDS_APART[name])
    pace = report.pace
    gaps = {name: len([v for v in world.votes if v.annotator == name]) for name in ANNOTATORS}
    timed = {
        n: max(c - 1, 0) - (1 if n == "ann-a" and c > BREAK_AFTER else 0) for n, c in gaps.items()
    }
    hours = sum(timed[n] * SECONDS_APART[n] for n in ANNOTATORS) / 3600
    assert pace.timed_labels == sum(timed.values())
    assert pace.labels_per_hour == pytest.approx(sum(timed.values()) / hours)


def test_shown_versus_hidden_matches_statsmodels_newcombe(app, world):
    effect = _report(app, world.slug).shown_vs_hidden
    counts = Counter()
    for v in world.votes:
        if v.action < 0:
            continue
        group = "shown" if v.step in world.shown else "hidden"
        counts[group, "n"] += 1
        counts[group, "k"] += int(v.action == world.learner[v.step])
    assert (effect.n_shown, effect.n_hidden) == (counts["shown", "n"], counts["hidden", "n"])
    k1, n1, k2, n2 = (
        counts["shown", "k"],
        counts["shown", "n"],
        counts["hidden", "k"],
        counts["hidden", "n"],
    )
    assert effect.difference == pytest.approx(k1 / n1 - k2 / n2)
    # statsmodels confint_proportions_2indep(method='newcomb'): Newcombe 1998 method 10
    lower, upper = confint_proportions_2indep(k1, n1, k2, n2, method="newcomb", compare="diff")
    assert_allclose([effect.lower, effect.upper], [lower, upper], rtol=1e-9)


def test_a_span_copy_beside_its_authors_answer_is_no_vote_in_the_report(
    app, client, admin, uploader, make_user
):
    """The report's agreement takes each annotator's vote as the training set does: their own
    answer on a state, not a later span copy of another answer (it used to take the last)."""
    slug = builders.create_loop(client, admin, {**DISCRETE_SPEC, "slug": "span-report"})
    builders.open_round(client, admin, slug, "v1")
    rng = np.random.default_rng(3)
    keys = builders.upload_round(
        client,
        uploader,
        slug=slug,
        number=1,
        features=rng.normal(size=(1, 6, 3)),
        actions=np.zeros((1, 6), dtype=np.int64),
        action_names=DISCRETE_SPEC["action_space"]["actions"],
        prefix="sp",
    )
    steps = builders.step_ids(app, slug, keys, 6)[0].tolist()
    for name in ("ann-x", "ann-y"):
        make_user("annotator", name=name)
    ids = builders.user_ids(app, ["ann-x", "ann-y"])
    x, y = ids["ann-x"], ids["ann-y"]
    answers = [0, 1, 2, 0]  # both give these on steps 0..3: full agreement, by hand
    labels = [
        builders.LabelSpec(steps[i], who, action=a) for who in (x, y) for i, a in enumerate(answers)
    ]
    # ann-x then answers step 5 with hold, copied onto steps 3 and 4 as span labels
    labels += [builders.LabelSpec(steps[5], x, action=2)]
    labels += [builders.LabelSpec(steps[s], x, action=2, span=True) for s in (3, 4)]
    builders.add_selection_and_labels(
        app,
        slug=slug,
        number=1,
        audit=[],
        ranked=steps[:4] + [steps[5]],
        shown=set(),
        labels=labels,
    )
    report = _report(app, slug)
    # four states with two votes each, all equal: Krippendorff's alpha and Cohen's kappa are 1
    # (docs/references.md, "Krippendorff's alpha", "Cohen's kappa": observed disagreement 0)
    assert report.agreement.n_states == 4 and report.agreement.n_annotators == 2
    assert report.agreement.krippendorff[0].alpha == pytest.approx(1.0)
    assert report.agreement.cohen_kappa == pytest.approx(1.0)
    rows = {a.name: a for a in report.annotators}
    assert (rows["ann-x"].compared, rows["ann-x"].agreeing) == (4, 4)


def test_too_few_audit_labels_are_said_not_quoted(app, client, admin, uploader, make_user):
    world = build_discrete(app, client, admin, uploader, make_user, mode="three", n_audit=12)
    audit = _report(app, world.slug).audit.disagreement
    consensus = world.consensus()
    assert audit.n == sum(s in consensus for s in world.audit) < 30
    assert not audit.quoted
    assert audit.rate is None and audit.lower is None and audit.upper is None
    assert audit.note.startswith(f"too few audit labels: {audit.n} states")


def test_round_zero_and_an_unlabelled_round_report_without_numbers(
    app, client, admin, uploader, make_user
):
    world = build_discrete(app, client, admin, uploader, make_user, mode="two")
    zero = _report(app, world.slug, number=0)
    assert zero.counts.states == 60 and zero.counts.learner_states == 0
    assert zero.shift.mmd2 is None and "no training set" in zero.shift.note
    assert zero.audit.disagreement.n == 0 and zero.audit.disagreement.rate is None
    assert zero.agreement.n_states == 0 and zero.agreement.note
    assert zero.pace.labels_per_hour is None


def test_shift_on_a_seeded_subsample_of_a_large_round(app, client, admin, uploader, make_user):
    rng = np.random.default_rng(8)
    slug = builders.create_loop(client, admin, DISCRETE_SPEC)
    builders.open_round(client, admin, slug, "v1")
    demos = rng.normal(size=(4, 10, 3)).astype(np.float32)
    builders.upload_round(
        client, uploader, slug=slug, number=0, features=demos,
        actions=rng.integers(0, 3, (4, 10)), action_names=["proceed", "creep", "hold"],
        prefix="d",
    )  # fmt: skip
    visited = (rng.normal(size=(60, 20, 3)) + [0.0, 0.0, 0.4]).astype(np.float32)
    keys = builders.upload_round(
        client, uploader, slug=slug, number=1, features=visited,
        actions=rng.integers(0, 3, (60, 20)), action_names=["proceed", "creep", "hold"],
        prefix="v",
    )  # fmt: skip
    ids = builders.step_ids(app, slug, keys, 20).reshape(-1)
    shift = _report(app, slug).shift
    assert (shift.n_round, shift.n_round_sample, shift.n_training_sample) == (1200, 1000, 40)
    # the documented draw: a generator seeded with (SHIFT_SEED, round number) picks 1000 of the
    # round's step ids without replacement (the 40 training states are all used)
    draw = np.random.default_rng([service.SHIFT_SEED, 1])
    chosen = set(np.sort(draw.choice(np.sort(ids), 1000, replace=False)).tolist())
    by_id = dict(zip(ids.tolist(), visited.reshape(-1, 3).astype(np.float64), strict=True))
    y = np.array([by_id[i] for i in sorted(chosen)])
    x = demos.reshape(-1, 3).astype(np.float64)
    centre, scale = x.mean(axis=0), x.std(axis=0)
    xs, ys = (x - centre) / scale, (y - centre) / scale
    # docs/references.md, "Median heuristic bandwidth"
    bandwidth = np.median(pdist(np.vstack([xs, ys])))
    assert_allclose(shift.bandwidth, bandwidth, rtol=1e-9)
    assert_allclose(shift.mmd2, _direct_unbiased_mmd2(xs, ys, bandwidth), rtol=1e-7)


def test_a_loops_reports_read_the_training_set_once_and_match_each_rounds_own(
    app, client, admin, uploader, make_user, monkeypatch
):
    """The loop's reports compare each round with the training set before it, taken from one
    read of the training set as it is now; each must equal the report of its round computed
    alone (which reads the training set up to the round before). The shift's training count
    grows from round 1 to round 2 by round 1's resolved relabels (the test's own record)."""
    world = build_discrete(app, client, admin, uploader, make_user, mode="two")
    rng = np.random.default_rng(5)
    for number in (2, 3):
        builders.open_round(client, admin, world.slug, f"v{number}")
        builders.upload_round(
            client, uploader, slug=world.slug, number=number,
            features=rng.normal(size=(2, 10, 3)).astype(np.float32),
            actions=np.zeros((2, 10), np.int64), action_names=list(DISCRETE_SPEC["action_space"]["actions"]),
            prefix=f"r{number}-",
        )  # fmt: skip
    with app.state.session_factory() as session:
        loop = loops_service.get_loop(session, slug=world.slug)
        alone = [service.compute_round_report(session, loop=loop, number=n) for n in range(4)]
        reads = []
        members = service.ts.members
        monkeypatch.setattr(
            service.ts, "members", lambda *a, **k: reads.append(1) or members(*a, **k)
        )
        together = service.loop_reports(session, loop=loop)
    assert len(reads) == 1
    assert [r.model_dump() for r in together] == [r.model_dump() for r in alone]
    n_training = [r.shift.n_training for r in together[1:]]
    assert n_training == [60, 60 + len(world.consensus()), 60 + len(world.consensus())]


def test_agreement_on_votes_that_never_vary_says_why_it_is_undefined(
    app, client, admin, uploader, make_user
):
    """Two annotators who give the same action on every state: the kappas and alpha are
    undefined (chance agreement is already perfect), and the report says so instead of
    leaving bare nulls that read as "not computed"."""
    slug = builders.create_loop(client, admin, {**DISCRETE_SPEC, "slug": "all-hold"})
    builders.open_round(client, admin, slug, "v1")
    rng = np.random.default_rng(4)
    keys = builders.upload_round(
        client, uploader, slug=slug, number=1, features=rng.normal(size=(1, 6, 3)),
        actions=np.zeros((1, 6), dtype=np.int64),
        action_names=DISCRETE_SPEC["action_space"]["actions"], prefix="h",
    )  # fmt: skip
    steps = builders.step_ids(app, slug, keys, 6)[0].tolist()
    for name in ("ann-p", "ann-q"):
        make_user("annotator", name=name)
    ids = builders.user_ids(app, ["ann-p", "ann-q"])
    builders.add_selection_and_labels(
        app, slug=slug, number=1, audit=[], ranked=steps, shown=set(),
        labels=[builders.LabelSpec(s, ids[n], action=2) for n in ("ann-p", "ann-q") for s in steps],
    )  # fmt: skip
    agreement = _report(app, slug).agreement
    matrix = np.full((2, 6), 2.0)
    # sklearn cohen_kappa_score: undefined (nan) when both raters use one category only
    # (docs/references.md, "Cohen's kappa")
    with pytest.warns(UserWarning):
        assert np.isnan(cohen_kappa_score(matrix[0], matrix[1]))
    # krippendorff package refuses a single value in the domain
    # (docs/references.md, "Krippendorff's alpha")
    with pytest.raises(ValueError, match="more than one value"):
        krippendorff.alpha(reliability_data=matrix, level_of_measurement="nominal")
    assert (agreement.n_states, agreement.n_annotators, agreement.n_votes) == (6, 2, 12)
    assert agreement.cohen_kappa is None and agreement.fleiss_kappa is None
    assert agreement.krippendorff[0].alpha is None
    assert agreement.note is not None
    assert "Cohen's kappa, Fleiss' kappa, Krippendorff's alpha undefined" in agreement.note
    assert "all 12 votes on the 6 states with two or more votes give the same action" in (
        agreement.note
    )
    # the loop page says it too, under the agreement table with the dashes
    page = client.get(f"/loops/{slug}", headers=admin)
    assert page.status_code == 200 and f"Round 1: {agreement.note}." in html.unescape(page.text)


def test_a_feature_constant_at_different_values_says_why_its_shift_is_missing(
    app, client, admin, uploader, make_user
):
    """A feature constant in the training set and in the round, at another value, has no
    spread: its standardised difference is unbounded (not JSON), so it is null with a note."""
    rng = np.random.default_rng(6)
    slug = builders.create_loop(client, admin, {**DISCRETE_SPEC, "slug": "flat-feature"})
    builders.open_round(client, admin, slug, "v1")
    demos = rng.normal(size=(3, 10, 3)).astype(np.float32)
    demos[..., 1] = 0.5
    visited = rng.normal(size=(4, 10, 3)).astype(np.float32)
    visited[..., 1] = 2.0
    for number, features, prefix in ((0, demos, "d"), (1, visited, "v")):
        builders.upload_round(
            client, uploader, slug=slug, number=number, features=features,
            actions=rng.integers(0, 3, (features.shape[0], 10)),
            action_names=DISCRETE_SPEC["action_space"]["actions"], prefix=prefix,
        )  # fmt: skip
    shift = _report(app, slug).shift
    x, y = demos.reshape(-1, 3).astype(np.float64), visited.reshape(-1, 3).astype(np.float64)
    # Cohen's d with a pooled ddof=1 standard deviation (docs/references.md,
    # "Standardised mean difference"): zero pooled spread in feature 1, so d is unbounded
    pooled = np.sqrt((29 * x.var(axis=0, ddof=1) + 39 * y.var(axis=0, ddof=1)) / 68)
    assert pooled[1] == 0 and y[:, 1].mean() != x[:, 1].mean()
    flat = shift.features[0]  # the unbounded difference ranks first
    assert flat.name == DISCRETE_SPEC["features"][1]["name"]
    assert flat.smd is None and flat.pooled_std == 0.0
    assert flat.note is not None and "constant in both samples at different values" in flat.note
    assert "training 0.5, round 2" in flat.note
    others = {f.name: f for f in shift.features[1:]}
    for i in (0, 2):
        got = others[DISCRETE_SPEC["features"][i]["name"]]
        assert got.note is None
        assert_allclose(got.smd, (y[:, i].mean() - x[:, i].mean()) / pooled[i], rtol=1e-9)
    # the loop page's feature table carries the note where the number would be
    page = client.get(f"/loops/{slug}", headers=admin)
    assert page.status_code == 200 and flat.note in page.text


def test_labels_on_states_without_a_learner_action_are_named_as_the_reason_for_no_rate(
    app, client, admin, uploader, make_user
):
    """Rollouts that recorded no learner action: every audit state has an expert answer but
    nothing to compare it with. The note must say that, not "0 states with an expert answer"
    alone, which reads as a round that still lacks labels."""
    slug = builders.create_loop(client, admin, {**DISCRETE_SPEC, "slug": "no-learner-action"})
    builders.open_round(client, admin, slug, "v1")
    rng = np.random.default_rng(9)
    keys = builders.upload_round(
        client, uploader, slug=slug, number=1, features=rng.normal(size=(4, 10, 3)),
        actions=np.full((4, 10), -1, dtype=np.int64),  # -1: no learner action recorded
        action_names=DISCRETE_SPEC["action_space"]["actions"], prefix="na",
    )  # fmt: skip
    steps = builders.step_ids(app, slug, keys, 10).reshape(-1).tolist()
    make_user("annotator", name="ann-n")
    who = builders.user_ids(app, ["ann-n"])["ann-n"]
    builders.add_selection_and_labels(
        app, slug=slug, number=1, audit=steps[:35], ranked=steps[35:], shown=set(),
        labels=[builders.LabelSpec(s, who, action=1) for s in steps],
    )  # fmt: skip
    report = _report(app, slug)
    # the test's own record: 35 audit and 5 ranked states, each with one answer, none with a
    # learner action, so none can be compared
    for sample, labelled in ((report.audit, 35), (report.ranked, 5)):
        rate = sample.disagreement
        assert (rate.n, rate.n_excluded, rate.rate) == (0, labelled, None)
        assert rate.note is not None and (
            f"{labelled} more states with an expert answer were left out because their "
            "rollouts recorded no learner action" in rate.note
        )
    assert report.audit.disagreement.note.startswith("too few audit labels: 0 states")
