"""The demo learner: a bootstrap ensemble of small neural networks (invented demo setup).

Each member is a scikit-learn MLP with one small hidden layer, trained on its own bootstrap
resample of the standardised features, so the members disagree where the data are thin. That
disagreement is what the service's sampler reads as uncertainty. Discrete: each member gives
action probabilities and the ensemble acts on their mean. Continuous: each member regresses the
action scaled to [0, 1] per dimension; the ensemble acts on the members' mean, clipped to bounds.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray
from sklearn.exceptions import ConvergenceWarning
from sklearn.neural_network import MLPClassifier, MLPRegressor

from ..loops.spec import parse_spec
from . import scenario as sc

FloatArray = NDArray[np.float64]

N_MEMBERS = 5
HIDDEN_UNITS = 32
# Large batches with a high step size: a member on a few thousand states trains in about
# 0.2 s on one core and still fits the expert's training states closely.
MAX_ITER = 40
BATCH_SIZE = 512
LEARNING_RATE = 0.01


@dataclass(frozen=True)
class Ensemble:
    """A fitted bootstrap ensemble; call ``predict`` (or the object itself) on features."""

    kind: str
    members: tuple[Any, ...]
    feature_mean: FloatArray
    feature_scale: FloatArray
    action_low: FloatArray
    action_high: FloatArray
    n_actions: int

    def member_outputs(self, features: NDArray[Any]) -> FloatArray:
        """Each member's output: (n, M, K) probabilities or (n, M, D) actions."""
        x = np.asarray(features, dtype=np.float64)
        if x.ndim != 2 or x.shape[1] != len(self.feature_mean):
            raise ValueError(
                f"features must have shape (n, {len(self.feature_mean)}), got {x.shape}"
            )
        z = (x - self.feature_mean) / self.feature_scale
        outputs = []
        for member in self.members:
            if self.kind == "discrete":
                probs = np.zeros((len(z), self.n_actions))
                # A resample may miss a rare action; that member gives it probability 0.
                probs[:, member.classes_] = member.predict_proba(z)
                outputs.append(probs)
            else:
                unit = np.asarray(member.predict(z)).reshape(len(z), -1)
                span = self.action_high - self.action_low
                outputs.append(
                    np.clip(self.action_low + unit * span, self.action_low, self.action_high)
                )
        return np.stack(outputs, axis=1)

    def predict(self, features: NDArray[Any]) -> sc.PolicyOutput:
        """Actions, mean probabilities (discrete) and member outputs for (n, d) features."""
        members = self.member_outputs(features)
        mean = members.mean(axis=1)
        if self.kind == "discrete":
            return sc.PolicyOutput(
                action=mean.argmax(axis=1).astype(np.int64), probs=mean, ensemble=members
            )
        return sc.PolicyOutput(action=mean, probs=None, ensemble=members)

    __call__ = predict


def _action_bounds(kind: str) -> tuple[FloatArray, FloatArray]:
    """The demo loop's action bounds, read as every stage reads a loop's (empty when discrete)."""
    spec = sc.loop_spec(kind)
    typed = parse_spec(spec["features"], spec["action_space"])
    return typed.low, typed.high


def fit(
    features: NDArray[Any],
    actions: NDArray[Any],
    kind: str,
    rng: np.random.Generator,
    *,
    n_members: int = N_MEMBERS,
    hidden_units: int = HIDDEN_UNITS,
    max_iter: int = MAX_ITER,
) -> Ensemble:
    """Fit a bootstrap ensemble on expert-labelled states.

    Parameters
    ----------
    features : ndarray of shape (n_states, n_features)
    actions : ndarray of shape (n_states,) int action indices (discrete) or (n_states, D)
    kind : {"discrete", "continuous"}
    rng : numpy.random.Generator
        Draws the resamples and each member's initialisation seed.
    """
    sc.check_kind(kind)
    x = np.asarray(features, dtype=np.float64)
    y = np.asarray(actions)
    n_actions = len(sc.DISCRETE_ACTIONS)
    n_dims = len(sc.CONTINUOUS_DIMENSIONS)
    if x.ndim != 2 or len(x) < 2 or not np.all(np.isfinite(x)):
        raise ValueError("features must be a finite (n_states >= 2, n_features) array")
    expected = (len(x),) if kind == "discrete" else (len(x), n_dims)
    if y.shape != expected:
        raise ValueError(f"actions must have shape {expected}, got {y.shape}")
    if kind == "discrete" and (np.any(y < 0) or np.any(y >= n_actions)):
        raise ValueError(f"discrete actions must be indices in [0, {n_actions})")
    if n_members < 1 or hidden_units < 1 or max_iter < 1:
        raise ValueError("n_members, hidden_units and max_iter must be >= 1")
    mean = x.mean(axis=0)
    scale = x.std(axis=0)
    scale[scale == 0] = 1.0  # constant features (e.g. one load in the data) stay at 0
    z = (x - mean) / scale
    low, high = _action_bounds(kind)
    target = y.astype(np.int64) if kind == "discrete" else (y - low) / (high - low)
    members = []
    for _ in range(n_members):
        sample = rng.integers(0, len(z), size=len(z))
        seed = int(rng.integers(0, 2**31 - 1))
        members.append(_fit_member(z[sample], target[sample], kind, hidden_units, max_iter, seed))
    return Ensemble(kind, tuple(members), mean, scale, low, high, n_actions)


def _fit_member(
    z: FloatArray, target: NDArray[Any], kind: str, hidden: int, max_iter: int, seed: int
) -> Any:
    if kind == "discrete" and len(np.unique(target)) == 1:
        return _Constant(int(target[0]))
    model: Any
    options: dict[str, Any] = {
        "alpha": 1e-3,
        "batch_size": BATCH_SIZE,
        "learning_rate_init": LEARNING_RATE,
        "max_iter": max_iter,
        "random_state": seed,
    }
    if kind == "discrete":
        model = MLPClassifier(hidden_layer_sizes=(hidden,), **options)
    else:
        model = MLPRegressor(hidden_layer_sizes=(hidden,), **options)
    with warnings.catch_warnings():
        # Stopping before full convergence is on purpose: it keeps training cheap.
        warnings.simplefilter("ignore", ConvergenceWarning)
        model.fit(z, target)
    return model


class _Constant:
    """A member whose resample held one action only: it always gives that action."""

    def __init__(self, action: int) -> None:
        self.classes_ = np.array([action])

    def predict_proba(self, z: FloatArray) -> FloatArray:
        return np.ones((len(z), 1))
