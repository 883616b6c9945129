"""Choose which candidate states go to the annotators under a label budget.

Rules (the README's "Ranking a round (the sampler)"; docs/references.md, "Selection rules"):

1. A uniform random *audit* sample is drawn first, ``round_half_up(audit_fraction * budget)``
   states from all candidates, so the learner's on-policy error can be estimated without bias.
2. The rest of the budget is filled in descending score order, skipping any state within
   ``min_gap`` steps (``|p - p_taken| < min_gap``, positions counted in the rollout's recorded
   steps) of a state already taken from the same rollout, audit picks included. Plain top-B picks
   near-duplicates; the gap spreads labels across time. Counting in steps, not seconds, keeps
   the rule's effect the same at any control rate.
3. With ``stratify=True`` the ranked part is taken in another order: the candidates are split
   into k-means cells in standardised feature space, and the cells share the picks in
   proportion to their total score, each cell best-scored first (app/sampler/strata.py), so
   the picks follow where the learner spent its time instead of one corner of the score. A
   round too short for the gap to leave room for every ranked pick goes in score order.
   Optionally (``spread=True``) the ranked part is chosen by k-center greedy (farthest-first)
   in standardised feature space from a pool of the best gap-respecting candidates.
4. The budget is always spent when there are at least ``budget`` candidates: where the gap
   leaves too few eligible states, it is halved step by step, then dropped, and the fill goes on
   in score order; each relaxation is reported in :attr:`SelectionResult.notes`.

Candidates are the states the learner controlled: steps where the expert was in control
are labels already, go straight to the training set upstream, and must never be passed here.

All work is done in a canonical order, sorted by (rollout, position, input position), so the
result does not depend on the order the store returned the rows in: shuffling the input changes
only the indices reported, never the states chosen (given unique (rollout, position) pairs).
Score ties are broken by that canonical order, which equals input order when input is so sorted.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from numpy.typing import ArrayLike, NDArray

from .novelty import Standardiser
from .strata import strata, stratified_order

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]

REASON_AUDIT = "audit"
REASON_RANKED = "ranked"


@dataclass(frozen=True)
class SelectionResult:
    """Chosen states, in the order chosen (audit picks first).

    Attributes
    ----------
    indices : ndarray of shape (n_chosen,)
        Positions in the input arrays.
    reasons : ndarray of shape (n_chosen,), dtype str
        "audit" or "ranked".
    ranks : ndarray of shape (n_chosen,)
        1-based position of each chosen state in the descending order of effective score
        (score plus takeover boost) over all candidates; audit picks get theirs too.
    effective_scores : ndarray of shape (n_candidates,)
        Scores after the takeover boost, in input order.
    n_audit : int
        Number of audit picks.
    final_gap : float
        The gap in force when the last ranked pick was taken (``min_gap`` unless relaxed).
    notes : list of str
        What had to give to fill the budget, or why fewer than ``budget`` were chosen.
    """

    indices: IntArray
    reasons: NDArray[np.str_]
    ranks: IntArray
    effective_scores: FloatArray
    n_audit: int
    final_gap: float = 0.0
    notes: list[str] = field(default_factory=list)


def _canonical_order(rollout_ids: ArrayLike, times: FloatArray) -> tuple[IntArray, IntArray]:
    """Return (order, rollout codes) with order sorting by (rollout, time or position, input)."""
    _, codes = np.unique(np.asarray(rollout_ids), return_inverse=True)
    codes = codes.astype(np.int64).ravel()
    order = np.lexsort((np.arange(times.size), times, codes))
    return order.astype(np.int64), codes


def rollout_positions(rollout_ids: ArrayLike, step_index: ArrayLike) -> IntArray:
    """Position of each step within its rollout, counting the rollout's recorded steps.

    Parameters
    ----------
    rollout_ids : array_like of shape (n_steps,)
    step_index : array_like of shape (n_steps,)
        The steps' indices as recorded (unique within a rollout; gaps allowed).

    Returns
    -------
    ndarray of shape (n_steps,)
        0 for a rollout's first recorded step, 1 for the next, and so on. A robot that logs
        every fifth step of a 50 Hz controller and one that logs every step at 10 Hz give the
        same positions to the same moments, so a gap counted in positions means the same
        stretch of the rollout at any rate of recording.
    """
    idx = np.asarray(step_index, dtype=np.int64)
    if idx.ndim != 1 or np.asarray(rollout_ids).shape != idx.shape:
        raise ValueError("rollout_ids and step_index must be 1-d arrays of the same length")
    order, codes = _canonical_order(rollout_ids, idx.astype(np.float64))
    sorted_codes = codes[order]
    starts = np.searchsorted(sorted_codes, sorted_codes, side="left")
    positions = np.empty(idx.size, dtype=np.int64)
    positions[order] = np.arange(idx.size) - starts
    return positions


def _count_before(
    codes: IntArray, times: FloatArray, query_times: FloatArray, inclusive: bool
) -> IntArray:
    """For sorted (codes, times), count rows before (codes[i], query_times[i]) lexicographically.

    ``inclusive`` counts rows with equal time too. Exact (no float offsets): a merge by lexsort.
    """
    n = codes.size
    # At equal (code, time) the flag decides whether data rows sort before the query.
    data_flag, query_flag = (0, 1) if inclusive else (1, 0)
    all_codes = np.concatenate([codes, codes])
    all_times = np.concatenate([times, query_times])
    flags = np.concatenate([np.full(n, data_flag), np.full(n, query_flag)])
    merged = np.lexsort((flags, all_times, all_codes))
    is_query = merged >= n
    data_before: IntArray = np.cumsum(~is_query) - (~is_query)
    counts = np.empty(n, dtype=np.int64)
    counts[merged[is_query] - n] = data_before[is_query]
    return counts


def _gap_windows(codes: IntArray, times: FloatArray, min_gap: float) -> tuple[IntArray, IntArray]:
    """Canonical-position windows [lo, hi) of states within min_gap in the same rollout."""
    lo = _count_before(codes, times, times - min_gap, inclusive=True)
    hi = _count_before(codes, times, times + min_gap, inclusive=False)
    # ``t_i <= t_j - gap`` and ``|t_i - t_j| >= gap`` can disagree in the last bit (e.g.
    # 0.9 - 0.3 vs 0.9 - 0.6000000000000001), so move each edge until the rule as stated holds.
    # Within a rollout the rule is monotone in time, so a few vectorised steps settle it.
    start = np.searchsorted(codes, codes, side="left")
    end = np.searchsorted(codes, codes, side="right")

    def inside(pos: IntArray) -> NDArray[np.bool_]:
        return np.abs(times[np.clip(pos, 0, codes.size - 1)] - times) < min_gap

    while np.any(move := (lo > start) & inside(lo - 1)):
        lo[move] -= 1
    while np.any(move := (lo < hi) & ~inside(lo)):
        lo[move] += 1
    while np.any(move := (hi < end) & inside(hi)):
        hi[move] += 1
    while np.any(move := (hi > lo) & ~inside(hi - 1)):
        hi[move] -= 1
    return lo, hi


def _validate(
    scores: ArrayLike,
    rollout_ids: ArrayLike,
    positions: ArrayLike,
    budget: int,
    min_gap: float,
    audit_fraction: float,
    features: ArrayLike | None,
    spread: bool,
    spread_pool_factor: int,
    boost: ArrayLike | None,
    stratify: bool = False,
) -> tuple[FloatArray, FloatArray, NDArray[np.float64] | None]:
    s = np.asarray(scores, dtype=np.float64)
    t = np.asarray(positions, dtype=np.float64)
    n = s.size
    if s.ndim != 1 or t.shape != s.shape or np.asarray(rollout_ids).shape != s.shape:
        raise ValueError("scores, rollout_ids and positions must be 1-d arrays of the same length")
    if not (np.all(np.isfinite(s)) and np.all(np.isfinite(t))):
        raise ValueError("scores and positions must be finite")
    if budget < 0:
        raise ValueError(f"budget must be >= 0, got {budget}")
    if not (np.isfinite(min_gap) and min_gap >= 0):
        raise ValueError(f"min_gap must be >= 0, got {min_gap}")
    if not 0 <= audit_fraction <= 1:
        raise ValueError(f"audit_fraction must be in [0, 1], got {audit_fraction}")
    if boost is not None:
        b = np.asarray(boost, dtype=np.float64)
        if b.shape != s.shape or not np.all(np.isfinite(b)):
            raise ValueError("takeover_boost must be a finite array of the same length as scores")
        s = s + b
    f = None
    if spread and spread_pool_factor < 1:
        raise ValueError(f"spread_pool_factor must be >= 1, got {spread_pool_factor}")
    if spread or stratify:
        if features is None:
            raise ValueError("spread=True and stratify=True need features")
        f = np.asarray(features, dtype=np.float64)
        if f.ndim != 2 or f.shape[0] != n:
            raise ValueError(f"features: expected shape ({n}, n_features), got {f.shape}")
    return s, t, f


def _farthest_first(points: FloatArray, n_pick: int) -> IntArray:
    """k-center greedy: start at row 0, then repeatedly take the row farthest from those taken."""
    picks = np.empty(n_pick, dtype=np.int64)
    if n_pick == 0:
        return picks
    picks[0] = 0
    # Squared distances by the expansion |p|^2 + |c|^2 - 2 p.c: one matrix-vector product per
    # pick. The points are standardised (centred), so the expansion does not cancel badly.
    sq_norms = np.einsum("ij,ij->i", points, points)
    nearest = np.maximum(sq_norms + sq_norms[0] - 2.0 * (points @ points[0]), 0.0)
    for i in range(1, n_pick):
        nxt = int(np.argmax(nearest))  # first maximum: ties go to the better-scored row
        picks[i] = nxt
        candidate = sq_norms + sq_norms[nxt] - 2.0 * (points @ points[nxt])
        np.minimum(nearest, np.maximum(candidate, 0.0), out=nearest)
    return picks


def relaxed_gaps(min_gap: float) -> list[float]:
    """The gaps tried in turn to fill a budget: ``min_gap``, halved (whole steps), then 0.

    Halving keeps as much spread as the round allows before giving it up. A gap of one step
    blocks nothing but the state itself, so the ladder stops halving at 2: 10 gives
    [10, 5, 2, 0] and 50 gives [50, 25, 12, 6, 3, 0].
    """
    gaps = [float(min_gap)]
    while (half := float(np.floor(gaps[-1] / 2))) >= 2:
        gaps.append(half)
    if gaps[-1] > 0:
        gaps.append(0.0)
    return gaps


def _fill(
    by_score: IntArray,
    blocked: NDArray[np.bool_],
    lo: IntArray,
    hi: IntArray,
    target: int,
    accepted: list[int],
) -> None:
    """Take unblocked candidates in score order until ``accepted`` holds ``target``.

    Sequential by nature (each pick blocks its neighbours); O(1) per candidate plus the slice
    writes, and the loop stops as soon as the target is met.
    """
    if len(accepted) >= target:
        return
    lo_list, hi_list = lo.tolist(), hi.tolist()
    for pos in by_score.tolist():
        if blocked[pos]:
            continue
        accepted.append(pos)
        blocked[lo_list[pos] : hi_list[pos]] = True
        blocked[pos] = True
        if len(accepted) == target:
            return


def _block_around(taken: IntArray, lo: IntArray, hi: IntArray, n: int) -> NDArray[np.bool_]:
    """Candidates blocked by the states already taken under the windows (lo, hi)."""
    blocked = np.zeros(n, dtype=bool)
    blocked[taken] = True
    for a in taken.tolist():
        blocked[lo[a] : hi[a]] = True
    return blocked


def _gap_words(gap: float) -> str:
    return f"{gap:g} step" if gap == 1 else f"{gap:g} steps"


def select(
    scores: ArrayLike,
    rollout_ids: ArrayLike,
    positions: ArrayLike,
    budget: int,
    *,
    min_gap: float,
    audit_fraction: float = 0.1,
    rng: np.random.Generator,
    features: ArrayLike | None = None,
    spread: bool = False,
    spread_pool_factor: int = 5,
    takeover_boost: ArrayLike | None = None,
    stratify: bool = False,
) -> SelectionResult:
    """Choose ``min(budget, n_candidates)`` candidate states: an audit sample, then the best.

    Parameters
    ----------
    scores : array_like of shape (n_candidates,)
        Larger is more useful to label (e.g. :func:`app.sampler.scores.combined_score`).
    rollout_ids : array_like of shape (n_candidates,)
        Rollout of each state (any sortable type: ints or strings).
    positions : array_like of shape (n_candidates,)
        Position of each state within its rollout, in recorded steps (0, 1, 2, ... over all the
        rollout's steps, expert-driven ones included).
    budget : int
        Number of states to choose. Exactly ``budget`` are chosen when there are at least that
        many candidates (the gap is relaxed if it must be, see the module notes); otherwise all.
    min_gap : float
        Ranked picks should be at least this many steps from every state already taken
        (audit or ranked) in the same rollout. 0 disables the rule.
    audit_fraction : float
        ``n_audit = floor(audit_fraction * budget + 0.5)`` (half-up), capped at the number of
        candidates, drawn uniformly without replacement from all candidates regardless of
        score or gap.
    rng : numpy.random.Generator
        Draws the audit sample; record its seed with the selection.
    features : array_like of shape (n_candidates, n_features), optional
        Needed when ``spread`` is True; standardised here over the candidates.
    spread : bool
        Choose the ranked part by k-center greedy. The pool is the first
        ``spread_pool_factor * n_ranked`` candidates that the score-order gap rule would accept
        (so every subset of it respects the gap); farthest-first starts from the best-scored
        pool member and is not seeded with the audit picks.
    spread_pool_factor : int
        Pool size as a multiple of the ranked budget.
    takeover_boost : array_like of shape (n_candidates,), optional
        Added to ``scores`` before ranking; see :func:`takeover_boost`.
    stratify : bool
        Take the ranked part in the order of :func:`app.sampler.strata.stratified_order` over
        ``min(n_ranked, MAX_STRATA)`` k-means cells of the standardised ``features`` (needed),
        drawn from ``rng`` after the audit sample; scores must be non-negative.

    Returns
    -------
    SelectionResult
    """
    s, t, f = _validate(
        scores,
        rollout_ids,
        positions,
        budget,
        min_gap,
        audit_fraction,
        features,
        spread,
        spread_pool_factor,
        takeover_boost,
        stratify,
    )
    n = s.size
    notes: list[str] = []
    if n < budget:
        notes.append(f"only {n} candidates for a budget of {budget}: all of them were chosen")
    order, codes = _canonical_order(rollout_ids, t)
    c_scores, c_codes, c_times = s[order], codes[order], t[order]

    # Descending score, ties by canonical position (stable sort of the negated scores).
    by_score = np.argsort(-c_scores, kind="stable")
    score_rank = np.empty(n, dtype=np.int64)
    score_rank[by_score] = np.arange(1, n + 1)

    n_audit = min(int(np.floor(audit_fraction * budget + 0.5)), n, budget)
    audit = rng.choice(n, size=n_audit, replace=False).astype(np.int64)

    lo, hi = _gap_windows(c_codes, c_times, min_gap)
    blocked = _block_around(audit, lo, hi, n)
    n_ranked = min(budget, n) - n_audit
    target = n_ranked * spread_pool_factor if spread else n_ranked
    accepted: list[int] = []
    if stratify and n_ranked > 1:
        assert f is not None
        cells = strata(Standardiser.fit(f).transform(f[order]), n_ranked, rng)
        _fill(stratified_order(c_scores, cells), blocked.copy(), lo, hi, target, accepted)
        if len(accepted) < target:
            # A round too short for the gap: the gap already spreads the few picks it allows
            # over the whole round, and strata would only take places from the best states.
            notes.append(
                f"{_gap_words(min_gap)} left room for {len(accepted)} of {target} ranked "
                "states: ranked in score order, without strata"
            )
            accepted = []
    if not accepted:
        _fill(by_score, blocked, lo, hi, target, accepted)
    ranked = np.asarray(accepted, dtype=np.int64)
    if spread and ranked.size > n_ranked:
        assert f is not None
        standardiser = Standardiser.fit(f)
        pool_points = standardiser.transform(f[order[ranked]])
        ranked = ranked[_farthest_first(pool_points, n_ranked)]

    final_gap = float(min_gap)
    if ranked.size < n_ranked:
        short = n_ranked - ranked.size
        accepted = ranked.tolist()
        for gap in relaxed_gaps(min_gap)[1:]:
            lo, hi = _gap_windows(c_codes, c_times, gap)
            taken = np.concatenate([audit, np.asarray(accepted, dtype=np.int64)])
            _fill(by_score, _block_around(taken, lo, hi, n), lo, hi, n_ranked, accepted)
            final_gap = gap
            if len(accepted) == n_ranked:
                break
        added = len(accepted) - ranked.size
        relaxed = "dropped" if final_gap == 0 else f"relaxed to {_gap_words(final_gap)}"
        notes.append(
            f"gap {relaxed} to fill the budget: {_gap_words(min_gap)} left room for "
            f"{n_ranked - short} of {n_ranked} ranked states; {added} more were taken"
        )
        ranked = np.asarray(accepted, dtype=np.int64)

    chosen = np.concatenate([audit, ranked])
    reasons = np.array([REASON_AUDIT] * audit.size + [REASON_RANKED] * ranked.size, dtype=str)
    return SelectionResult(
        indices=order[chosen],
        reasons=reasons,
        ranks=score_rank[chosen],
        effective_scores=s,
        n_audit=n_audit,
        final_gap=final_gap,
        notes=notes,
    )


def takeover_boost(
    rollout_ids: ArrayLike,
    times: ArrayLike,
    takeover_mask: ArrayLike,
    window_s: float,
    boost: float,
) -> FloatArray:
    """Additive score boost for learner states just before an expert takeover.

    A takeover starts at each expert-controlled step whose predecessor in the same rollout
    (by time) was learner-controlled, or which opens the rollout. A learner state at time ``t``
    gets ``boost`` when the next takeover start ``T`` in its rollout satisfies
    ``0 < T - t <= window_s``; boosts do not stack. Expert-controlled states get 0: they are
    labels already and are excluded from the candidates upstream.

    Parameters
    ----------
    rollout_ids : array_like of shape (n_states,)
    times : array_like of shape (n_states,)
        Seconds within the rollout.
    takeover_mask : array_like of shape (n_states,), dtype bool
        True where the expert was in control.
    window_s : float
        Length of the window before a takeover, seconds (>= 0).
    boost : float
        Value added to the score of states in the window.

    Returns
    -------
    ndarray of shape (n_states,)
        ``boost`` or 0 for each state, in input order. Pass all steps of the rollouts
        (expert steps included) here, then keep only the learner rows for :func:`select`.
    """
    t = np.asarray(times, dtype=np.float64)
    mask = np.asarray(takeover_mask, dtype=bool)
    if t.ndim != 1 or mask.shape != t.shape or np.asarray(rollout_ids).shape != t.shape:
        raise ValueError("rollout_ids, times and takeover_mask must be 1-d of the same length")
    if not np.all(np.isfinite(t)):
        raise ValueError("times must be finite")
    if not (np.isfinite(window_s) and window_s >= 0 and np.isfinite(boost)):
        raise ValueError("window_s must be >= 0 and boost finite")
    n = t.size
    out = np.zeros(n)
    if n == 0:
        return out
    order, codes = _canonical_order(rollout_ids, t)
    c_codes, c_times, c_mask = codes[order], t[order], mask[order]
    new_rollout = np.ones(n, dtype=bool)
    new_rollout[1:] = c_codes[1:] != c_codes[:-1]
    prev_mask = np.zeros(n, dtype=bool)
    prev_mask[1:] = c_mask[:-1]
    onset = np.flatnonzero(c_mask & (new_rollout | ~prev_mask))
    if onset.size == 0:
        return out
    # Next onset strictly after each canonical position; later onsets are further in time.
    nxt = np.searchsorted(onset, np.arange(n), side="right")
    has_next = nxt < onset.size
    nxt_pos = onset[np.minimum(nxt, onset.size - 1)]
    lead = c_times[nxt_pos] - c_times
    in_window = has_next & (c_codes[nxt_pos] == c_codes) & (lead > 0) & (lead <= window_s) & ~c_mask
    out[order[in_window]] = boost
    return out
