"""Self-tuning: learn from labelled rounds which of the sampler's signals predict disagreement.

Each labelled state tells whether the learner disagreed with the expert there. A small logistic
regression of that outcome on the sampler's own signals (uncertainty percentile, novelty
percentile, nearness to a takeover) says how much each signal is worth; once enough
disagreements have been seen, the next round is ranked by the predicted probability of
disagreement instead of the fixed weighted mean.

How ranked states were chosen is accounted for by weighting. A round's labelled states are two
strata of its candidates: the ranked picks (chosen for their scores, each standing for itself)
and the uniform audit sample, which stands for every candidate that was not a ranked pick. So a
ranked row weighs 1 and an audit row weighs (candidates - ranked picks) / audit rows: the
weighted log-likelihood is then an unbiased estimate of the log-likelihood over all of the
round's candidates (Horvitz and Thompson's inverse inclusion probability, by stratum), and the
fit is not tilted towards the high-score corner where the ranked picks sit. Fitting on the audit
share alone would be unbiased too but needs many rounds before it holds enough disagreements
(10% of a budget of 20 is two states a round).

Pure functions over numpy arrays; the fit uses scipy's L-BFGS-B on the exact gradient. See
docs/references.md, "Logistic regression".
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

FloatArray = NDArray[np.float64]

SIGNALS = ("uncertainty_pct", "novelty_pct", "near_takeover")
"""The model's inputs, in column order."""
DEFAULT_PENALTY = 1.0
"""Inverse L2 strength C, as scikit-learn's LogisticRegression(C=1.0): keeps the fit finite
when a few disagreements separate perfectly."""
CALIBRATION_BINS = 5


@dataclass(frozen=True)
class DisagreementModel:
    """A fitted model: P(disagree) = 1 / (1 + exp(-(intercept + signals @ weights)))."""

    intercept: float
    weights: dict[str, float]
    n_labelled: int
    n_disagreements: int
    effective_n: float
    # Kish effective counts of the disagreeing and agreeing rows (None: fitted before they
    # were recorded); see enough_to_rank
    effective_disagreements: float | None = None
    effective_agreements: float | None = None

    def predict(self, signals: ArrayLike) -> FloatArray:
        """Predicted probability of disagreement for rows of signals (n, len(SIGNALS))."""
        x = np.asarray(signals, dtype=np.float64)
        coef = np.array([self.weights[name] for name in SIGNALS])
        return expit(self.intercept + x @ coef)

    def record(self) -> dict[str, object]:
        return asdict(self)

    @classmethod
    def from_record(cls, record: dict[str, object]) -> DisagreementModel:
        return cls(**record)  # type: ignore[arg-type]


def expit(z: ArrayLike) -> FloatArray:
    """The logistic function, computed without overflow."""
    from scipy.special import expit as _expit

    return np.asarray(_expit(np.asarray(z, dtype=np.float64)), dtype=np.float64)


def stratum_weights(is_audit: ArrayLike, n_candidates: int) -> FloatArray:
    """Inverse-inclusion weights of one round's labelled states (see the module notes).

    Parameters
    ----------
    is_audit : array_like of shape (n_labelled,), dtype bool
        True for audit picks, False for ranked picks.
    n_candidates : int
        Candidates the round's selection chose from.

    Returns
    -------
    ndarray of shape (n_labelled,)
        1 for ranked picks; (n_candidates - ranked) / audit for audit picks (at least 1).
    """
    audit = np.asarray(is_audit, dtype=bool)
    n_audit = int(audit.sum())
    n_ranked = audit.size - n_audit
    weights = np.ones(audit.size)
    if n_audit:
        weights[audit] = max((n_candidates - n_ranked) / n_audit, 1.0)
    return weights


def fit_logistic(
    x: ArrayLike, y: ArrayLike, sample_weight: ArrayLike | None = None, c: float = DEFAULT_PENALTY
) -> tuple[float, FloatArray]:
    """L2-penalised, weighted logistic regression: the same objective as scikit-learn's.

    Minimises ``0.5 * |w|^2 + c * sum_i s_i * log(1 + exp(-t_i (b + x_i w)))`` with
    ``t_i = 2 y_i - 1``; the intercept ``b`` is not penalised.

    Parameters
    ----------
    x : array_like of shape (n, d)
    y : array_like of shape (n,)
        0 or 1.
    sample_weight : array_like of shape (n,), optional
    c : float
        Inverse penalty strength (> 0).

    Returns
    -------
    intercept : float
    weights : ndarray of shape (d,)
    """
    from scipy.optimize import minimize
    from scipy.special import log_expit

    xm = np.asarray(x, dtype=np.float64)
    t = 2.0 * np.asarray(y, dtype=np.float64) - 1.0
    s = np.ones(len(t)) if sample_weight is None else np.asarray(sample_weight, np.float64)
    if xm.ndim != 2 or t.shape != (xm.shape[0],) or s.shape != t.shape:
        raise ValueError("x must be (n, d) with y and sample_weight of shape (n,)")
    if not c > 0:
        raise ValueError(f"c must be positive, got {c}")

    def objective(theta: FloatArray) -> tuple[float, FloatArray]:
        b, w = theta[0], theta[1:]
        margin = t * (b + xm @ w)
        loss = 0.5 * float(w @ w) - c * float(s @ log_expit(margin))
        # d/dz -log(expit(z)) = -expit(-z)
        g = -c * s * t * expit(-margin)
        grad = np.concatenate([[g.sum()], w + xm.T @ g])
        return loss, grad

    found = minimize(
        objective,
        np.zeros(xm.shape[1] + 1),
        jac=True,
        method="L-BFGS-B",
        options={"maxiter": 1000, "gtol": 1e-10, "ftol": 1e-14},
    )
    return float(found.x[0]), np.asarray(found.x[1:], dtype=np.float64)


def fit_disagreement_model(
    signals: ArrayLike, disagrees: ArrayLike, weights: ArrayLike
) -> DisagreementModel:
    """Fit P(disagree | signals) on labelled states with their stratum weights.

    Parameters
    ----------
    signals : array_like of shape (n, len(SIGNALS))
    disagrees : array_like of shape (n,), dtype bool
    weights : array_like of shape (n,)
        From :func:`stratum_weights`, round by round. Scaled here to sum to n, so the penalty
        weighs as it would on n unweighted rows.
    """
    x = np.asarray(signals, dtype=np.float64)
    y = np.asarray(disagrees, dtype=bool)
    w = np.asarray(weights, dtype=np.float64)
    if len(y) == 0:
        raise ValueError("no labelled states to fit on")
    w = w * (len(w) / w.sum())
    intercept, coef = fit_logistic(x, y.astype(np.float64), w)
    return DisagreementModel(
        intercept=intercept,
        weights={name: float(v) for name, v in zip(SIGNALS, coef, strict=True)},
        n_labelled=int(len(y)),
        n_disagreements=int(y.sum()),
        effective_n=effective_count(w),
        effective_disagreements=effective_count(w[y]),
        effective_agreements=effective_count(w[~y]),
    )


def effective_count(weights: ArrayLike) -> float:
    """Kish's effective sample size ``(sum w)^2 / sum w^2`` of weighted rows (0 for none).

    Equal weights give the number of rows; one row weighing far more than the rest counts as
    about one.
    """
    w = np.asarray(weights, dtype=np.float64)
    return float(w.sum() ** 2 / (w @ w)) if w.size and (w @ w) > 0 else 0.0


def enough_to_rank(model: DisagreementModel, minimum: int, *, effective: bool = True) -> bool:
    """Rank by the model only with at least `minimum` disagreements and agreements behind it.

    Counted as the fit sees them (``effective``): an audit row stands for many candidates and
    weighs accordingly, so a fit over a few audit rows and many ranked ones rests on about as
    many observations as there are audit rows, however many ranked rows it holds. Counting rows
    (``effective=False``, how rankings requested before the effective counts were recorded
    decided) let a model fitted on some eight effective observations rank rounds, and it ranked
    them worse than its own uncertainty input (README, "Self-tuning").
    """
    if effective and model.effective_disagreements is not None:
        assert model.effective_agreements is not None
        return min(model.effective_disagreements, model.effective_agreements) >= minimum
    return min(model.n_disagreements, model.n_labelled - model.n_disagreements) >= minimum


def calibration(predicted: ArrayLike, disagrees: ArrayLike) -> dict[str, object]:
    """How well predicted probabilities match what the audit sample showed.

    Parameters
    ----------
    predicted : array_like of shape (n,)
    disagrees : array_like of shape (n,), dtype bool

    Returns
    -------
    dict
        ``n``; ``brier`` (mean squared error of the probabilities); ``expected`` (sum of the
        predictions) against ``observed`` disagreements; ``bins``: equal-width probability
        bins with their count, mean prediction and observed rate (empty bins left out).
    """
    p = np.asarray(predicted, dtype=np.float64)
    y = np.asarray(disagrees, dtype=bool)
    if p.shape != y.shape or p.ndim != 1:
        raise ValueError("predicted and disagrees must be 1-d of the same length")
    if p.size == 0:
        return {"n": 0, "brier": None, "expected": 0.0, "observed": 0, "bins": []}
    edges = np.linspace(0.0, 1.0, CALIBRATION_BINS + 1)
    which = np.clip(np.digitize(p, edges[1:-1]), 0, CALIBRATION_BINS - 1)
    bins = []
    for b in range(CALIBRATION_BINS):
        inside = which == b
        if inside.any():
            bins.append(
                {
                    "low": float(edges[b]),
                    "high": float(edges[b + 1]),
                    "n": int(inside.sum()),
                    "mean_predicted": float(p[inside].mean()),
                    "observed_rate": float(y[inside].mean()),
                }
            )
    return {
        "n": int(p.size),
        "brier": float(np.mean((p - y) ** 2)),
        "expected": float(p.sum()),
        "observed": int(y.sum()),
        "bins": bins,
    }


def disagreement_of(
    learner: ArrayLike, expert: ArrayLike, tolerance: ArrayLike | None = None
) -> tuple[NDArray[np.bool_], NDArray[np.bool_]]:
    """Whether the learner disagreed with the expert, and where both actions are known.

    Discrete actions (1-d, -1 = none) disagree when they differ; continuous ones (2-d, NaN =
    none) when any dimension differs by more than its tolerance, as in the round report.

    Returns
    -------
    disagrees, known : ndarrays of shape (n,), dtype bool
    """
    a = np.asarray(learner)
    b = np.asarray(expert)
    if a.ndim == 1:
        known = (a >= 0) & (b >= 0)
        return (a != b) & known, known
    tol = np.asarray(tolerance, dtype=np.float64)
    known = ~np.isnan(a).any(axis=1) & ~np.isnan(b).any(axis=1)
    with np.errstate(invalid="ignore"):
        differs = (np.abs(a - b) > tol).any(axis=1)
    return differs & known, known
